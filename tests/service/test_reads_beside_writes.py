"""Reads do not queue behind a writer: on SQLite they begin without the write lock (WAL lets
them see the last commit), so status and events answer while ingest holds its transaction."""

from __future__ import annotations

import httpx
import pytest
from fastapi import FastAPI
from tests.factories import rail_spec, sample

from phaseward.settings import Settings
from phaseward.store import rails
from phaseward.store.db import transaction

pytestmark = pytest.mark.anyio


@pytest.fixture
def settings(settings: Settings) -> Settings:
    return settings.model_copy(update={"sqlite_busy_timeout_ms": 300})  # a waiter fails fast


async def test_status_and_events_answer_while_a_write_transaction_is_open(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    assert (await client.post("/v1/rails", json=rail_spec())).status_code == 201
    answer = await client.post("/v1/rails/bench-a/samples", json=sample(0, [20.0] * 4))
    assert answer.status_code == 200
    with transaction(app.state.sessions) as writer:
        rails.get(writer, "bench-a", for_update=True)  # the writer holds its lock from here
        # A reader that took the write lock would wait out the busy timeout and fail (503).
        status = await client.get("/v1/rails/bench-a/status")
        events = await client.get("/v1/events", params={"rail_id": "bench-a"})
    assert status.status_code == 200, status.text
    assert status.json()["last_sample"]["seq"] == 0
    assert events.status_code == 200, events.text
