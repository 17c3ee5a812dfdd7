"""An unavailable database: a read-only database and a full one answer 503, store nothing.

Both conditions are real, not mocked: the read-only database is opened the way an operator
would point the service at one (SQLite's ``mode=ro`` URI, PostgreSQL's
``default_transaction_read_only``), and the full one is a SQLite file whose page count is
capped at its present size (``PRAGMA max_page_count``), which raises SQLite's own
SQLITE_FULL, "database or disk is full", exactly as a full disk does. Every table is compared
row by row before and after the refused requests.
"""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any

import httpx
import pytest
from fastapi import FastAPI
from sqlalchemy import Engine, create_engine, event, inspect, text
from sqlalchemy.engine import make_url
from tests.factories import SMALL_RAIL, rail_spec, sample

from phaseward.api.app import close, create_app
from phaseward.settings import Settings

pytestmark = pytest.mark.anyio
EVEN = [20.0, 20.0, 20.0, 20.0]
TRIPPED = [20.0, 0.0, 26.7, 26.7]


def open_settings(settings: Settings, **changes: Any) -> Settings:
    """The test settings without access keys (loopback only), with ``changes``."""
    return Settings.model_validate(settings.model_dump() | {"auth_mode": "open", **changes})


@asynccontextmanager
async def serving(app: FastAPI) -> AsyncIterator[httpx.AsyncClient]:
    transport = httpx.ASGITransport(app=app)
    try:
        async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as c:
            yield c
    finally:
        close(app)


def snapshot(database_url: str) -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every table, in primary-key order, read over a connection of its own."""
    engine = create_engine(database_url)
    try:
        with engine.connect() as conn:
            tables = sorted(inspect(conn).get_table_names())
            out: dict[str, list[tuple[Any, ...]]] = {}
            for table in tables:
                rows = conn.execute(text(f"SELECT * FROM {table}")).all()
                out[table] = sorted((tuple(r) for r in rows), key=repr)
            return out
    finally:
        engine.dispose()


def isolating_samples(first: int, count: int) -> list[dict[str, Any]]:
    """``count`` samples from ``first`` on, phase 1's breaker tripped from the third."""
    out = []
    for seq in range(first, first + count):
        body = sample(seq, EVEN if seq < first + 2 else TRIPPED)
        if seq >= first + 2:
            body["phases"][1]["breaker_tripped"] = True
        out.append(body)
    return out


async def seed(client: httpx.AsyncClient) -> None:
    """A rail with samples, events and a live state to compare against."""
    answer = await client.post("/v1/rails", json=SMALL_RAIL)
    assert answer.status_code == 201, answer.text
    answer = await client.post("/v1/rails/bench-a/samples", json=isolating_samples(0, 6))
    assert answer.status_code == 200, answer.text
    events = (await client.get("/v1/rails/bench-a/events")).json()["items"]
    assert any(e["kind"] == "phase.isolated" for e in events)


def assert_unavailable(answer: httpx.Response, reason: str) -> None:
    assert answer.status_code == 503, answer.text
    body = answer.json()
    assert body["error"] == "service_unavailable"
    assert body["detail"].startswith("database unavailable: ")
    assert reason in body["detail"].lower()


def read_only_url(database_url: str) -> tuple[str, str]:
    """The same database opened read-only, and the words its refusal carries."""
    url = make_url(database_url)
    if url.get_backend_name() == "sqlite":
        assert url.database is not None
        path = Path(url.database).resolve().as_posix()
        return f"sqlite:///file:{path}?mode=ro&uri=true", "readonly database"
    options = f"{url.query.get('options', '')} -cdefault_transaction_read_only=on".strip()
    ro = url.update_query_dict({"options": options}).render_as_string(hide_password=False)
    return ro, "read-only transaction"


async def test_read_only_database_refuses_writes_and_keeps_serving_reads(
    settings: Settings, database_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)  # a URI filename once made a directory "file:" in here
    async with serving(create_app(open_settings(settings))) as client:
        await seed(client)
        event_id = (await client.get("/v1/rails/bench-a/events")).json()["items"][0]["id"]
    before = snapshot(database_url)
    assert len(before["samples"]) == 6

    ro_url, reason = read_only_url(database_url)
    new_version = {k: v for k, v in rail_spec(load_a=80.0).items() if k != "id"}
    async with serving(create_app(open_settings(settings, database_url=ro_url))) as client:
        status_before = (await client.get("/v1/rails/bench-a/status")).json()
        refused = [
            await client.post("/v1/rails/bench-a/samples", json=isolating_samples(6, 8)),
            await client.post("/v1/rails", json=rail_spec(id="bench-b")),
            await client.put("/v1/rails/bench-a", json=new_version),
            await client.post(f"/v1/events/{event_id}/ack", json={"by": "bench operator"}),
            await client.delete("/v1/rails/bench-a"),
        ]
        status_after = await client.get("/v1/rails/bench-a/status")
    for answer in refused:
        assert_unavailable(answer, reason)
    # Reads go on: the operator still sees the rail as it was.
    assert status_after.status_code == 200, status_after.text
    assert status_after.json()["last_sample"]["seq"] == status_before["last_sample"]["seq"] == 5
    assert snapshot(database_url) == before
    assert not (tmp_path / "file:").exists()


async def test_full_database_refuses_a_batch_whole_and_takes_it_once_there_is_room(
    settings: Settings, tmp_path: Path
) -> None:
    url = f"sqlite:///{(tmp_path / 'full.db').as_posix()}"
    app = create_app(open_settings(settings, database_url=url))
    cap: list[int | None] = [None]

    def limit_pages(dbapi_conn: Any, _record: Any) -> None:
        if cap[0] is not None:
            dbapi_conn.execute(f"PRAGMA max_page_count={cap[0]}")

    engine: Engine = app.state.engine
    event.listen(engine, "connect", limit_pages)
    async with serving(app) as client:
        await seed(client)
        with engine.connect() as conn:
            cap[0] = int(conn.exec_driver_sql("PRAGMA page_count").scalar_one())
        engine.dispose()  # every connection from here on has no room to grow
        before = snapshot(url)
        batch = isolating_samples(6, 40)  # far more than the free space left in the pages

        refused = await client.post("/v1/rails/bench-a/samples", json=batch)
        assert_unavailable(refused, "database or disk is full")
        assert snapshot(url) == before
        status = await client.get("/v1/rails/bench-a/status")
        assert status.status_code == 200, status.text
        assert status.json()["last_sample"]["seq"] == 5

        cap[0] = None
        engine.dispose()  # room again: the client's resend is taken whole, once
        again = await client.post("/v1/rails/bench-a/samples", json=batch)
        assert again.status_code == 200, again.text
        assert again.json()["stored"] == 40
        assert again.json()["duplicates"] == 0
    engine = create_engine(url)
    with engine.connect() as conn:
        seqs = conn.execute(text("SELECT seq FROM samples ORDER BY seq")).scalars().all()
    engine.dispose()
    assert seqs == list(range(46))
