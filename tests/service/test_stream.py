"""The live event stream (Server-Sent Events) and its resume."""

from __future__ import annotations

import json
import os

import anyio
import httpx
import pytest
from fastapi import FastAPI
from sqlalchemy import insert
from tests.factories import SMALL_RAIL, rail_spec, sample

from phaseward.store.models import Event

pytestmark = pytest.mark.anyio


def frames(text: str) -> list[dict[str, str]]:
    out = []
    for block in text.split("\n\n"):
        fields = dict(line.split(": ", 1) for line in block.splitlines() if ": " in line)
        if "id" in fields:
            out.append(fields)
    return out


async def test_stream_from_the_start_and_resume(client: httpx.AsyncClient) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    temps = [100.0, 120.0, 100.0]
    body = [sample(k, [20.0] * 4, temps=t) for k, t in enumerate(temps)]
    await client.post("/v1/rails/bench-a/samples", json=body)
    first = await client.get("/v1/events/stream", params={"after": 0, "limit": 3})
    assert first.headers["content-type"].startswith("text/event-stream")
    got = frames(first.text)
    assert [f["event"] for f in got] == ["rail.condition", "thermal.warning", "thermal.warning"]
    assert json.loads(got[0]["data"])["rail_id"] == "bench-a"
    rest = await client.get(
        "/v1/events/stream", params={"limit": 6}, headers={"last-event-id": got[-1]["id"]}
    )
    resumed = frames(rest.text)
    assert int(resumed[0]["id"]) == int(got[-1]["id"]) + 1
    assert len(resumed) == 6  # the 9 events so far: 3 then 6, none twice


async def test_stream_filters_by_kind(client: httpx.AsyncClient) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    body = [sample(k, [20.0] * 4, temps=t) for k, t in enumerate([100.0, 120.0])]
    await client.post("/v1/rails/bench-a/samples", json=body)
    answer = await client.get(
        "/v1/events/stream", params={"after": 0, "limit": 1, "kind": "rail.condition"}
    )
    assert [f["event"] for f in frames(answer.text)] == ["rail.condition"]


async def test_bad_last_event_id(client: httpx.AsyncClient) -> None:
    answer = await client.get("/v1/events/stream", headers={"last-event-id": "x"})
    assert answer.status_code == 422
    assert answer.json()["field"] == "last-event-id"


@pytest.mark.skipif(
    not os.environ.get("PHASEWARD_TEST_DATABASE_URL"),
    reason="on SQLite one writer runs at a time: ids commit in order",
)
async def test_an_event_committed_after_a_higher_id_is_streamed(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    """Issue 17 item 1: rail a's transaction draws the lower id but commits after rail b's
    events have been streamed; the stream must still hand it out (and nothing twice)."""
    for rail in ("a", "b"):
        assert (await client.post("/v1/rails", json=rail_spec(id=rail))).status_code == 201
    slow = app.state.sessions()
    slow.begin()
    slow.execute(
        insert(Event),
        [{"rail_id": "a", "version": 1, "t_s": 1.8e9, "kind": "phase.isolated",
          "severity": "critical", "phase": 1, "message": "late", "details": {}}],
    )  # fmt: skip
    body = [sample(k, [20.0] * 4, temps=t) for k, t in enumerate([100.0, 120.0, 100.0])]
    assert (await client.post("/v1/rails/b/samples", json=body)).status_code == 200
    committed = (await client.get("/v1/events", params={"limit": 1000})).json()["items"]
    assert committed
    assert all(e["rail_id"] == "b" for e in committed)
    got: list[dict[str, str]] = []

    async def follow() -> None:
        params = {"after": 0, "limit": len(committed) + 1}
        got.extend(frames((await client.get("/v1/events/stream", params=params)).text))

    with anyio.fail_after(60):  # long transactions of other tests on the server delay it
        async with anyio.create_task_group() as tasks:
            tasks.start_soon(follow)
            await anyio.sleep(1.5)  # the stream polls meanwhile: b's events are final, a's not
            slow.commit()
    slow.close()
    stored = (await client.get("/v1/events", params={"limit": 1000})).json()["items"]
    assert sorted(int(f["id"]) for f in got) == sorted(e["id"] for e in stored)
    late = next(e for e in stored if e["message"] == "late")
    # Resuming just past the late event gives exactly what followed it in the stream.
    order = [int(f["id"]) for f in got]
    rest = order[order.index(late["id"]) + 1 :]
    resumed = await client.get(
        "/v1/events/stream", params={"limit": len(rest)},
        headers={"last-event-id": str(late["id"])},
    )  # fmt: skip
    assert [int(f["id"]) for f in frames(resumed.text)] == rest
