"""Retention: old samples become per-interval summaries, nothing newer is touched, events stay,
and history over the reduced period answers as before."""

from __future__ import annotations

import time

import httpx
import pytest
from fastapi import FastAPI
from tests.factories import SMALL_RAIL, sample

from phaseward.monitor import retention

pytestmark = pytest.mark.anyio
INTERVAL = 60.0


async def test_reduce_old_samples_and_keep_answering_history(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    now = time.time()
    old_start = (now // 86400 - 3) * 86400  # three days ago, on an interval boundary
    old = [
        sample(k, [10.0 + k % 7, 20.0, 20.0, 20.0], t0=old_start, temps=50.0 + k % 5)
        for k in range(150)
    ]
    recent = [sample(1000 + k, [20.0] * 4, t0=now - 1030) for k in range(5)]  # t = now - 30 + k
    for chunk in (old[:50], old[50:100], old[100:], recent):
        assert (await client.post("/v1/rails/bench-a/samples", json=chunk)).status_code == 200
    window = {"since": old_start, "until": old_start + 150}
    before = (await client.get("/v1/rails/bench-a/history", params=window)).json()
    events_before = (await client.get("/v1/events", params={"limit": 1000})).json()["items"]
    assert [r["reduced"] for r in before["rows"]] == [False, False, False]
    # By hand: 150 one-second samples from a boundary fill intervals of 60, 60 and 30.
    assert [r["count"] for r in before["rows"]] == [60, 60, 30]
    assert before["rows"][0]["current_a"]["min"][0] == 10.0
    assert before["rows"][0]["current_a"]["max"][0] == 16.0

    counts = retention.run(app.state.sessions, older_than_s=86400.0, interval_s=INTERVAL)
    assert counts == {"intervals": 3, "samples_deleted": 150, "partitions_dropped": 0}

    after = (await client.get("/v1/rails/bench-a/history", params=window)).json()
    assert [r["reduced"] for r in after["rows"]] == [True, True, True]
    for a, b in zip(before["rows"], after["rows"], strict=True):  # the same numbers
        assert {k: v for k, v in a.items() if k != "reduced"} == {
            k: v for k, v in b.items() if k != "reduced"
        }
    raw_old = (
        await client.get("/v1/rails/bench-a/samples", params={"since": 0, "until": now - 3600})
    ).json()
    assert raw_old["count"] == 0
    raw_new = (
        await client.get(
            "/v1/rails/bench-a/samples", params={"since": now - 3600, "until": now + 60}
        )
    ).json()
    assert raw_new["seq"] == [1000, 1001, 1002, 1003, 1004]  # nothing newer was touched
    events_after = (await client.get("/v1/events", params={"limit": 1000})).json()["items"]
    assert events_after == events_before
    assert retention.run(app.state.sessions, older_than_s=86400.0, interval_s=INTERVAL) == {
        "intervals": 0, "samples_deleted": 0, "partitions_dropped": 0,
    }  # fmt: skip


async def test_a_late_sample_merges_into_its_reduced_interval(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    start = (time.time() // 86400 - 3) * 86400
    first = [sample(k, [20.0] * 4, t0=start) for k in range(10)]
    await client.post("/v1/rails/bench-a/samples", json=first)
    retention.run(app.state.sessions, older_than_s=86400.0, interval_s=INTERVAL)
    late = sample(50, [40.0, 20.0, 20.0, 20.0], t0=start)  # t = start + 50, same interval
    assert (await client.post("/v1/rails/bench-a/samples", json=late)).status_code == 200
    retention.run(app.state.sessions, older_than_s=86400.0, interval_s=INTERVAL)
    (row,) = (
        await client.get("/v1/rails/bench-a/history", params={"since": start, "until": start + 60})
    ).json()["rows"]
    assert row["count"] == 11
    assert row["current_a"]["max"][0] == 40.0
    assert row["current_a"]["mean"][0] == pytest.approx((10 * 20.0 + 40.0) / 11)
