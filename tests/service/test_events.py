"""Event queries: filters, cursor pages, CSV, acknowledgement."""

from __future__ import annotations

import csv
import io

import httpx
import pytest
from tests.factories import SMALL_RAIL, sample

pytestmark = pytest.mark.anyio


@pytest.fixture
async def events_stored(client: httpx.AsyncClient) -> list[dict[str, object]]:
    """A rail whose temperature warnings toggle: 4 phases x 3 toggles = 12 events, and the
    rail's verdicts (readings past the limit forecast it at once: condition, forecast and N-1
    security events, worked out by the monitor, not by hand here)."""
    await client.post("/v1/rails", json=SMALL_RAIL)
    temps = [100.0, 120.0, 100.0, 120.0]
    body = [sample(k, [20.0] * 4, temps=t) for k, t in enumerate(temps)]
    await client.post("/v1/rails/bench-a/samples", json=body)
    page = (await client.get("/v1/events", params={"limit": 1000})).json()
    items: list[dict[str, object]] = page["items"]
    return items


async def test_newest_first_with_cursor(
    client: httpx.AsyncClient, events_stored: list[dict[str, object]]
) -> None:
    ids = [e["id"] for e in events_stored]
    assert ids == sorted(ids, reverse=True)
    assert len(ids) > 12
    seen: list[object] = []
    cursor = None
    while True:
        params: dict[str, str | int] = {"limit": 5} | ({"cursor": cursor} if cursor else {})
        page = (await client.get("/v1/rails/bench-a/events", params=params)).json()
        seen += [e["id"] for e in page["items"]]
        cursor = page["next_cursor"]
        if cursor is None:
            break
    assert seen == ids


async def test_filters(client: httpx.AsyncClient, events_stored: list[dict[str, object]]) -> None:
    async def count(**params: object) -> int:
        page = (await client.get("/v1/events", params=params)).json()  # type: ignore[arg-type]
        return len(page["items"])

    assert await count(kind="thermal.warning") == 12
    assert await count(kind="thermal.warning", severity="warning") == 8
    assert await count(kind="thermal.warning", phase=2) == 3
    conditions = sum(e["kind"] == "rail.condition" for e in events_stored)
    assert conditions >= 1
    assert await count(kind=["thermal.warning", "rail.condition"]) == 12 + conditions
    late = sum(e["time_s"] >= 1.8e9 + 2 for e in events_stored)  # type: ignore[operator]
    assert await count(since=1.8e9 + 2) == late  # samples 2 and 3 (t0 + seq)
    assert late >= 8  # the warnings of samples 2 and 3, worked out by hand
    assert await count(since="2027-01-15T08:30:00+00:00") == 0  # 2027 is after every sample
    early = sum(e["time_s"] < 1.8e9 + 1 for e in events_stored)  # type: ignore[operator]
    assert await count(until=1.8e9 + 1) == early >= 1  # sample 0: at least the first verdict


async def test_bad_filters_name_the_parameter(
    client: httpx.AsyncClient, events_stored: list[dict[str, object]]
) -> None:
    for params, field in [
        ({"severity": "loud"}, "severity"),
        ({"since": "yesterday"}, "since"),
        ({"since": "2027-01-15T08:30:00"}, "since"),
        ({"cursor": "abc"}, "cursor"),
        ({"limit": 0}, "limit"),
    ]:
        answer = await client.get("/v1/events", params=params)
        assert answer.status_code == 422, (params, answer.text)
        assert answer.json()["field"] == field


async def test_csv(client: httpx.AsyncClient, events_stored: list[dict[str, object]]) -> None:
    answer = await client.get("/v1/events", headers={"accept": "text/csv"})
    assert answer.headers["content-type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(answer.text)))
    assert len(rows) == len(events_stored)
    assert rows[0]["id"] == str(events_stored[0]["id"])
    assert rows[0]["kind"] == events_stored[0]["kind"]


@pytest.mark.parametrize(
    "by", ['=HYPERLINK("http://x.invalid","open")', "+1+cmd", "-2+3", "@SUM(A1)", "\tx", "\rx"]
)
async def test_csv_neutralises_formulas(
    client: httpx.AsyncClient, events_stored: list[dict[str, object]], by: str
) -> None:
    """Issue 17 item 12: a text cell a spreadsheet would run as a formula starts with a single
    quote (OWASP, CSV Injection); numbers, negative ones included, stay numbers."""
    event_id = events_stored[0]["id"]
    assert (await client.post(f"/v1/events/{event_id}/ack", json={"by": by})).status_code == 200
    answer = await client.get("/v1/events", headers={"accept": "text/csv"})
    rows = {r["id"]: r for r in csv.DictReader(io.StringIO(answer.text), strict=True)}
    assert rows[str(event_id)]["acked_by"] == "'" + by
    assert rows[str(event_id)]["acked_key"] == "open mode"
    assert all(not r["message"].startswith(("=", "+", "-", "@")) for r in rows.values())
    assert {r["phase"] for r in rows.values()} <= {"", "0", "1", "2", "3"}


async def test_acknowledge(
    client: httpx.AsyncClient, events_stored: list[dict[str, object]]
) -> None:
    event_id = events_stored[0]["id"]
    answer = await client.post(
        f"/v1/events/{event_id}/ack", json={"by": "night shift", "note": "fan swapped"}
    )
    assert answer.status_code == 200, answer.text
    assert answer.json()["acked_by"] == "night shift"
    assert answer.json()["acked_key"] == "open mode"  # the key's name; no key in open mode
    assert answer.json()["acked_at"] is not None
    again = await client.post(f"/v1/events/{event_id}/ack", json={"by": "day shift"})
    assert again.status_code == 409
    missing = await client.post("/v1/events/999999/ack", json={"by": "x"})
    assert missing.status_code == 404
    empty = await client.post(f"/v1/events/{event_id}/ack", json={"by": ""})
    assert empty.status_code == 422
    assert empty.json()["field"] == "by"


async def test_unknown_rail_events_is_404(client: httpx.AsyncClient) -> None:
    assert (await client.get("/v1/rails/none/events")).status_code == 404


async def test_an_event_kind_that_cannot_be_one_is_refused(client: httpx.AsyncClient) -> None:
    """A NUL byte in a kind filter answered 500 on PostgreSQL (found by the schema fuzz)."""
    for path in ("/v1/events", "/v1/rails/bench-a/events"):
        answer = await client.get(path, params={"kind": ["phase.isolated", "\x00x"]})
        assert answer.status_code == 422, answer.text
        assert answer.json()["field"] == "kind[1]"
