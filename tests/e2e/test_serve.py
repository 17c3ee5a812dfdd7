"""The real ``phaseward serve`` on a free loopback port, driven over HTTP."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from tests.factories import SMALL_RAIL, sample
from tests.servers import free_port, start_server

pytestmark = pytest.mark.e2e


@pytest.fixture
def server(tmp_path: Path) -> Iterator[str]:
    port = free_port()
    proc = start_server(tmp_path, port)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        proc.terminate()
        proc.wait(timeout=20)
    assert (tmp_path / "phaseward.db").exists()


def test_rail_samples_status_over_real_http(server: str) -> None:
    with httpx.Client(base_url=server, timeout=10) as c:
        assert c.post("/v1/rails", json=SMALL_RAIL).status_code == 201
        body = [sample(k, [20.0] * 4) for k in range(3)]
        answer = c.post("/v1/rails/bench-a/samples", json=body)
        assert answer.status_code == 200, answer.text
        assert answer.json()["stored"] == 3
        status = c.get("/v1/rails/bench-a/status").json()
        assert status["condition"] == "nominal"
        assert status["capacity"]["capacity_a"] == pytest.approx(120.0, rel=1e-5)
        assert c.get("/openapi.json").json()["info"]["title"] == "phaseward"
