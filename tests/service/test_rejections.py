"""Refused batches: one ``telemetry.rejected`` event per episode, exact counts in /metrics."""

from __future__ import annotations

import types

import httpx
import pytest
from tests.factories import SMALL_RAIL, sample

from phaseward.monitor import rejections

pytestmark = pytest.mark.anyio
EVEN = [20.0, 20.0, 20.0, 20.0]
RAIL = "/v1/rails/bench-a"


@pytest.fixture
async def rail(client: httpx.AsyncClient) -> str:
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    return RAIL


@pytest.fixture
def clock(monkeypatch: pytest.MonkeyPatch) -> list[float]:
    """The refusal clock, set by the test (the rest of the service keeps the real one)."""
    now = [1.8e9]
    monkeypatch.setattr(rejections, "time", types.SimpleNamespace(time=lambda: now[0]))
    return now


async def refusals(client: httpx.AsyncClient) -> list[dict[str, object]]:
    page = await client.get(f"{RAIL}/events", params={"kind": "telemetry.rejected"})
    assert page.status_code == 200, page.text
    items: list[dict[str, object]] = page.json()["items"]
    return items


def metric(text: str, name: str) -> int:
    line = next(x for x in text.splitlines() if x.startswith(f"{name} "))
    return int(line.split()[1])


async def test_many_refusals_are_one_episode_with_exact_counts(
    client: httpx.AsyncClient, rail: str, clock: list[float]
) -> None:
    sent_samples = 0
    seq = 1000
    for k in range(60):  # a misbehaving client: a minute of refusals, some good batches between
        clock[0] += 1.0
        if k % 2:
            body = [sample(seq, EVEN), sample(seq, EVEN), sample(seq + 1, EVEN)]  # seq twice
            field = "[1].seq"
        else:
            body = [sample(seq, EVEN) | {"vin_v": "twelve"}]  # refused by the schema
            field = "[0].vin_v"
        answer = await client.post(f"{rail}/samples", json=body)
        assert answer.status_code == 422, answer.text
        assert answer.json()["field"] == field
        sent_samples += len(body)
        if k % 10 == 9:
            good = await client.post(f"{rail}/samples", json=[sample(k, EVEN)])
            assert good.status_code == 200, good.text
        seq += 2

    events = await refusals(client)
    assert len(events) == 1
    details = events[0]["details"]
    assert isinstance(details, dict)
    assert details["batches"] == 60
    assert details["samples"] == sent_samples
    assert details["first"]["field"] == "[0].vin_v"
    assert details["last"]["field"] == "[1].seq"
    assert details["first"]["t_s"] == 1.8e9 + 1.0
    assert details["span_s"] == pytest.approx(59.0)
    assert details["fields"] == {"[0].vin_v": 30, "[1].seq": 30}

    text = (await client.get("/metrics")).text
    assert metric(text, "phaseward_batches_rejected_total") == 60
    assert metric(text, "phaseward_samples_rejected_total") == sent_samples


async def test_a_quiet_period_ends_the_episode(
    client: httpx.AsyncClient, rail: str, clock: list[float]
) -> None:
    bad = [sample(0, EVEN), sample(0, EVEN)]
    for step in (0.0, rejections.EPISODE_QUIET_S, rejections.EPISODE_QUIET_S + 0.5, 1.0):
        clock[0] += step
        assert (await client.post(f"{rail}/samples", json=bad)).status_code == 422
    # 0 opens; quiet exactly the limit: same episode; just over the limit: a new one; 1 s: same
    events = await refusals(client)
    assert [e["details"]["batches"] for e in events] == [2, 2]  # newest first
    assert events[0]["details"]["first"]["t_s"] == 1.8e9 + 2 * rejections.EPISODE_QUIET_S + 0.5
