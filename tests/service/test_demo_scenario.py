"""The demo's scripted scenario, replayed through the API and checked step by step."""

from __future__ import annotations

import httpx
import pytest

from phaseward.demo import DEMO_RAIL, FAILED_PHASE, RAIL_ID, T_FAULT, T_STEP, scenario_samples

pytestmark = pytest.mark.anyio


async def test_demo_scenario(client: httpx.AsyncClient) -> None:
    assert (await client.post("/v1/rails", json=DEMO_RAIL)).status_code == 201
    samples = scenario_samples(start_s=1.8e9)
    rail = f"/v1/rails/{RAIL_ID}"

    async def run(lo: int, hi: int) -> dict[str, object]:
        for k in range(lo, hi, 40):
            answer = await client.post(f"{rail}/samples", json=samples[k : min(k + 40, hi)])
            assert answer.status_code == 200, answer.text
        status: dict[str, object] = (await client.get(f"{rail}/status")).json()
        return status

    healthy = await run(0, T_FAULT)
    assert healthy["condition"] == "nominal"
    cap = healthy["capacity"]
    assert isinstance(cap, dict)
    # Six 45 A phases with the thermal limit not binding: 6 x 45 A.
    assert cap["capacity_a"] == pytest.approx(270.0, rel=1e-5)

    degraded = await run(T_FAULT, T_STEP)
    assert degraded["condition"] == "degraded"
    phases = degraded["phases"]
    assert isinstance(phases, list)
    assert phases[FAILED_PHASE]["condition"] == "isolated"
    after = degraded["capacity"]
    assert isinstance(after, dict)
    # Losing one of six equal phases takes one rating away, while current still binds.
    assert after["capacity_a"] == pytest.approx(225.0, rel=1e-5)

    end = await run(T_STEP, len(samples))
    page = (await client.get(f"{rail}/events", params={"limit": 200})).json()
    order = [(e["kind"], e["phase"]) for e in reversed(page["items"])]
    assert order[0] == ("rail.condition", None)
    assert order[1] == ("phase.isolated", FAILED_PHASE)
    assert order.index(("phase.isolated", FAILED_PHASE)) < order.index(("thermal.warning", 0)) if (
        "thermal.warning", 0) in order else True  # fmt: skip
    kinds = [k for k, _ in order]
    assert "thermal.warning" in kinds or "thermal.forecast" in kinds
    assert end["condition"] in ("degraded", "overloaded")
