"""The live event stream (Server-Sent Events) and its resume."""

from __future__ import annotations

import json

import httpx
import pytest
from tests.factories import SMALL_RAIL, sample

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
