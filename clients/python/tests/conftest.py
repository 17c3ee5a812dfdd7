"""One real phaseward service for the whole session (a subprocess on a free loopback port
with a temporary data dir); every test works on rails of its own."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from phaseward_client import Client
from support import new_rail_id, rail_definition, running_service


@pytest.fixture(scope="session")
def service_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    yield from running_service(tmp_path_factory.mktemp("phaseward-data"))


@pytest.fixture
def client(service_url: str) -> Iterator[Client]:
    with Client(service_url) as c:
        yield c


@pytest.fixture
def rail_id(client: Client) -> str:
    """A fresh rail (the four-phase test rail) on the service."""
    rid = new_rail_id()
    client.create_rail(rail_definition(rid))
    return rid
