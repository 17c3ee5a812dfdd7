"""Losing N-1 security is an event: ``capacity.exposed`` when some single further phase loss
would overload the rail (in any rail condition), cleared when it is regained, once per episode.

The rail (tests/factories.py): four phases of 30 A, thermal limit not binding at 25 degC, so
with equal sharing the rail carries 4 x 30 A and, after one loss, 3 x 30 A (common practice).
"""

from __future__ import annotations

import argparse
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import httpx
import pytest
from phaseward_client import EventPage
from tests.factories import SMALL_RAIL, sample

from phaseward import operator_cli

pytestmark = pytest.mark.anyio
RAIL = "/v1/rails/bench-a"


@pytest.fixture
async def rail(client: httpx.AsyncClient) -> str:
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    return RAIL


async def exposed_events(client: httpx.AsyncClient) -> list[dict[str, Any]]:
    page = await client.get(f"{RAIL}/events", params={"kind": "capacity.exposed", "limit": 100})
    assert page.status_code == 200, page.text
    return list(reversed(page.json()["items"]))


def loads(first: int, total_a: float, count: int, *, wobble_a: float = 0.0) -> list[Any]:
    """``count`` samples from seq ``first`` sharing ``total_a`` equally (a small alternating
    wobble keeps the load moving without changing the verdict)."""
    out = []
    for k in range(first, first + count):
        share = (total_a + (wobble_a if k % 2 else -wobble_a)) / 4
        out.append(sample(k, [share] * 4))
    return out


async def test_a_load_step_into_exposure_raises_once_and_clears(
    client: httpx.AsyncClient, rail: str
) -> None:
    await client.post(f"{rail}/samples", json=loads(0, 60.0, 5))
    assert await exposed_events(client) == []  # 60 A: any single loss leaves 90 A

    await client.post(f"{rail}/samples", json=loads(5, 100.0, 10, wobble_a=0.5))
    await client.post(f"{rail}/samples", json=loads(15, 100.0, 10, wobble_a=0.5))
    events = await exposed_events(client)
    assert len(events) == 1  # one per episode, however long it lasts
    lost = events[0]
    assert lost["severity"] == "warning"
    assert lost["details"]["seq"] == 5
    assert lost["details"]["cleared"] is False
    # 100 A against 3 x 30 A after any single loss: 10 A short, every loss overloads.
    assert lost["details"]["shortfall_a"] == pytest.approx(10.0, abs=0.6)
    assert lost["details"]["weakest"]["capacity_a"] == pytest.approx(90.0, rel=1e-3)
    assert len(lost["details"]["weakest"]["lose_phases"]) == 1
    assert lost["details"]["overloading_losses"] == lost["details"]["single_losses"] == 4
    assert "N-1 security lost" in lost["message"]
    status = (await client.get(f"{rail}/status")).json()
    assert status["condition"] == "exposed"
    assert status["screening"]["n1_secure"] is False

    await client.post(f"{rail}/samples", json=loads(25, 60.0, 5))
    events = await exposed_events(client)
    assert [e["details"]["cleared"] for e in events] == [False, True]
    regained = events[1]
    assert regained["severity"] == "info"
    assert regained["details"]["seq"] == 25
    assert (await client.get(f"{rail}/status")).json()["screening"]["n1_secure"] is True


async def test_a_degraded_rail_losing_security_raises_it_too(
    client: httpx.AsyncClient, rail: str
) -> None:
    """Phase 1 isolated at 60 A: the rest can lose one more (2 x 30 A = 60 A, not short);
    at 70 A it cannot, though the rail is only degraded, not exposed."""

    def tripped(seq: int, load: float) -> dict[str, Any]:
        body = sample(seq, [load / 3, 0.0, load / 3, load / 3])
        body["phases"][1]["breaker_tripped"] = True
        return body

    await client.post(f"{rail}/samples", json=[tripped(k, 58.0) for k in range(4)])
    assert await exposed_events(client) == []
    answer = await client.post(f"{rail}/samples", json=[tripped(k, 70.0) for k in range(4, 8)])
    assert answer.json()["condition"] == "degraded"
    events = await exposed_events(client)
    assert len(events) == 1
    assert events[0]["details"]["seq"] == 4
    assert events[0]["details"]["single_losses"] == 3  # only active phases can be lost
    assert 1 not in events[0]["details"]["weakest"]["lose_phases"]
    assert events[0]["details"]["shortfall_a"] == pytest.approx(10.0, abs=0.1)


async def test_a_rail_insecure_from_its_first_sample_says_so(
    client: httpx.AsyncClient, rail: str
) -> None:
    await client.post(f"{rail}/samples", json=loads(0, 100.0, 3))
    events = await exposed_events(client)
    assert [(e["details"]["seq"], e["details"]["cleared"]) for e in events] == [(0, False)]


async def test_the_command_line_spells_out_n1_lost_and_regained(
    client: httpx.AsyncClient,
    rail: str,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """``phaseward events`` marks the episode beside the kind (the rail condition ``exposed``
    reads too much alike; in a pipe the words say it, on a terminal the lost one is also
    highlighted). The command gets the service's real
    answer through a stand-in client."""
    await client.post(f"{rail}/samples", json=loads(0, 60.0, 3) + loads(3, 100.0, 3))
    await client.post(f"{rail}/samples", json=loads(6, 60.0, 3))
    answer = await client.get(f"{rail}/events", params={"limit": 100})
    page = EventPage.from_json(answer.json())

    class Stand:
        def list_events(self, rail_id: str, **_: Any) -> EventPage:
            assert rail_id == "bench-a"
            return page

    @contextmanager
    def connected(url: str | None, *, embedded: bool) -> Iterator[Stand]:
        yield Stand()

    monkeypatch.setattr(operator_cli, "connected", connected)
    args = argparse.Namespace(url=None, rail="bench-a", kind=None, follow=False, json=False,
                              limit=100)  # fmt: skip
    assert operator_cli.events(args) == 0
    text = capsys.readouterr().out
    assert text.count("capacity.exposed (N-1 LOST)") == 1
    assert text.count("capacity.exposed (N-1 regained)") == 1
    assert "N-1 security lost: losing phase" in text
