"""Reads do not queue behind a writer: on SQLite they begin without the write lock (WAL lets
them see the last commit), so status and events answer while ingest holds its transaction."""

from __future__ import annotations

from typing import Any

import anyio.to_thread
import httpx
import pytest
from fastapi import FastAPI
from tests.factories import rail_spec, sample

from phaseward.api.schemas.status import RailStatus
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


async def test_a_status_read_takes_one_worker_thread_turn_and_answers_its_model(
    client: httpx.AsyncClient, app: FastAPI, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A fleet's status reads wait for the server's interpreter at every crossing into a
    worker thread; the read is one crossing (the session, the status and its JSON), and the
    answer is the documented model, unknown fields refused, as before."""
    assert (await client.post("/v1/rails", json=rail_spec())).status_code == 201
    assert (await client.post("/v1/rails/bench-a/samples", json=sample(0, [20.0] * 4))).is_success
    turns = 0
    real = anyio.to_thread.run_sync

    async def counted(func: Any, *args: Any, **kw: Any) -> Any:
        nonlocal turns
        turns += 1
        return await real(func, *args, **kw)

    monkeypatch.setattr(anyio.to_thread, "run_sync", counted)
    answer = await client.get("/v1/rails/bench-a/status")
    assert answer.status_code == 200
    assert turns == 1  # as a plain route with a session dependency: 4
    shown = RailStatus.model_validate_json(answer.content)
    assert shown.model_dump(mode="json") == answer.json()
    assert answer.json()["last_sample"]["seq"] == 0
    missing = await client.get("/v1/rails/no-such/status")
    assert missing.status_code == 404
    assert missing.json()["field"] == "rail_id"
