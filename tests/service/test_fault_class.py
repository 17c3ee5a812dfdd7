"""The fault class written into a phase.isolated event once the samples after it arrive."""

from __future__ import annotations

from typing import Any

import httpx
import pytest
from tests.factories import SMALL_RAIL, sample

pytestmark = pytest.mark.anyio
EVEN = [20.0, 20.0, 20.0, 20.0]


def trace(kind: str) -> list[dict[str, Any]]:
    """Eight steady samples, the fault at sample 8 (phase 1 tripped from then on), six after."""
    out = []
    for k in range(15):
        if k < 8:
            body = sample(k, EVEN)
        else:
            body = sample(k, [80 / 3, 0.0, 80 / 3, 80 / 3])
            body["phases"][1]["breaker_tripped"] = True
        out.append(body)
    if kind == "low_side_short":
        out[7]["vin_v"], out[8]["vin_v"] = 11.0, 10.2  # shoot-through sags the input
        out[7]["vout_v"], out[8]["vout_v"] = 0.85, 0.80  # the shorted phase pulls the output down
    elif kind == "high_side_short":
        out[7]["phases"][1]["current_a"] = 55.0  # the phase current surges
        out[7]["vin_v"], out[8]["vin_v"] = 11.0, 10.0
        out[7]["vout_v"], out[8]["vout_v"] = 1.04, 1.09
    return out


async def isolated_signature(client: httpx.AsyncClient, body: list[dict[str, Any]]) -> Any:
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    for k in range(0, len(body), 3):  # posted in small pieces, as a rack would
        answer = await client.post("/v1/rails/bench-a/samples", json=body[k : k + 3])
        assert answer.status_code == 200, answer.text
    page = await client.get("/v1/rails/bench-a/events", params={"kind": "phase.isolated"})
    (event,) = page.json()["items"]
    return event["details"].get("signature")


@pytest.mark.parametrize("kind", ["high_side_short", "low_side_short", "open_phase"])
async def test_each_class(client: httpx.AsyncClient, kind: str) -> None:
    signature = await isolated_signature(client, trace(kind))
    assert signature["kind"] == kind, signature
    assert 0.0 < signature["confidence"] <= 1.0
    assert signature["evidence"]["samples_after"] >= 2


async def test_waits_for_the_samples_after(client: httpx.AsyncClient) -> None:
    signature = await isolated_signature(client, trace("open_phase")[:10])
    assert signature is None  # two samples after the event: not judged yet


async def test_too_little_history_is_undetermined(client: httpx.AsyncClient) -> None:
    body = trace("high_side_short")[6:]  # the fault comes with one steady sample before it
    signature = await isolated_signature(client, body)
    assert signature["kind"] == "undetermined"
