"""Phase and rail condition from telemetry, and the events the transitions leave."""

from __future__ import annotations

from typing import Any

import httpx
import pytest
from tests.factories import SMALL_RAIL, sample

pytestmark = pytest.mark.anyio
EVEN = [20.0, 20.0, 20.0, 20.0]


@pytest.fixture
async def rail(client: httpx.AsyncClient) -> str:
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    return "/v1/rails/bench-a"


async def kinds(client: httpx.AsyncClient, rail: str) -> list[tuple[str, int | None]]:
    page = (await client.get(f"{rail}/events", params={"limit": 100})).json()
    return [(e["kind"], e["phase"]) for e in reversed(page["items"])]


def tripped(seq: int, phase: int, load: float = 60.0, **kw: Any) -> dict[str, Any]:
    share = load / 3
    body = sample(seq, [0.0 if i == phase else share for i in range(4)], **kw)
    body["phases"][phase]["breaker_tripped"] = True
    return body


async def test_breaker_flag_isolates_at_once_and_capacity_drops_by_one_rating(
    client: httpx.AsyncClient, rail: str
) -> None:
    await client.post(f"{rail}/samples", json=[sample(k, [15.0] * 4) for k in range(3)])
    before = (await client.get(f"{rail}/status")).json()
    assert before["condition"] == "nominal"
    # Four 30 A phases, thermal limit not binding at this ambient: 4 x 30 A (common practice).
    assert before["capacity"]["capacity_a"] == pytest.approx(120.0, rel=1e-5)
    assert before["capacity"]["binding"] == "rating"
    assert before["screening"]["n1_secure"] is True

    answer = await client.post(f"{rail}/samples", json=tripped(3, phase=1))
    assert answer.json()["condition"] == "degraded"
    after = (await client.get(f"{rail}/status")).json()
    assert after["phases"][1]["condition"] == "isolated"
    assert after["phases"][1]["flags"] == ["breaker_tripped"]
    # N-1 with equal sharing: (N - 1) x rating (common practice).
    assert after["capacity"]["capacity_a"] == pytest.approx(90.0, rel=1e-5)
    assert after["capacity"]["headroom_a"] == pytest.approx(30.0, rel=1e-5)
    assert after["capacity"]["headroom_rated_a"] == pytest.approx(0.0, abs=1e-3)
    assert "monitoring aid" in after["caution"]
    assert await kinds(client, rail) == [
        ("rail.condition", None), ("phase.isolated", 1), ("rail.condition", None),
    ]  # fmt: skip


async def test_collapsed_current_isolates_only_after_debounce(
    client: httpx.AsyncClient, rail: str
) -> None:
    await client.post(f"{rail}/samples", json=[sample(k, EVEN) for k in range(3)])
    await client.post(f"{rail}/samples", json=sample(3, [26.0, 0.1, 26.0, 26.0]))
    status = (await client.get(f"{rail}/status")).json()
    assert status["phases"][1]["condition"] == "active"  # one low reading is not enough
    two = await client.post(f"{rail}/samples", json=sample(4, [26.0, 0.1, 26.0, 26.0]))
    assert two.json()["condition"] == "degraded"
    status = (await client.get(f"{rail}/status")).json()
    assert status["phases"][1]["condition"] == "isolated"
    restored = await client.post(f"{rail}/samples", json=[sample(k, EVEN) for k in (5, 6)])
    assert restored.json()["condition"] == "nominal"
    assert ("phase.restored", 1) in await kinds(client, rail)


async def test_load_above_remaining_capacity_overloads(
    client: httpx.AsyncClient, rail: str
) -> None:
    await client.post(f"{rail}/samples", json=[sample(k, EVEN) for k in range(2)])
    answer = await client.post(f"{rail}/samples", json=tripped(2, phase=0, load=95.0))
    assert answer.json()["condition"] == "overloaded"
    events = await kinds(client, rail)
    assert ("capacity.short", None) in events or ("capacity.short", 1) in events


async def test_one_loss_away_from_overload_is_exposed(client: httpx.AsyncClient, rail: str) -> None:
    answer = await client.post(f"{rail}/samples", json=[sample(k, [24.0] * 4) for k in range(3)])
    # 96 A > 3 x 30 A: losing any phase would overload the rail.
    assert answer.json()["condition"] == "exposed"
    status = (await client.get(f"{rail}/status")).json()
    assert status["screening"]["n1_secure"] is False
    assert status["screening"]["weakest"][0]["capacity_a"] == pytest.approx(90.0, rel=1e-5)


async def test_implausible_reading_without_flag_is_suspect(
    client: httpx.AsyncClient, rail: str
) -> None:
    await client.post(f"{rail}/samples", json=[sample(k, EVEN) for k in range(2)])
    bad = [sample(k, [20.0, 20.0, 20.0, 20.0]) for k in (2, 3)]
    for b in bad:
        b["phases"][3]["temp_c"] = -20.0  # 45 K below ambient: an open sensor
    answer = await client.post(f"{rail}/samples", json=bad)
    assert answer.json()["condition"] == "degraded"
    assert ("phase.suspect", 3) in await kinds(client, rail)


async def test_missing_phase_goes_silent(client: httpx.AsyncClient, rail: str) -> None:
    """A phase not reported keeps its last good reading for the staleness window (5 s by
    default), then it is silent."""
    await client.post(f"{rail}/samples", json=[sample(k, EVEN) for k in range(2)])
    partial = [sample(k, EVEN) for k in range(2, 9)]
    for p in partial:
        p["phases"] = p["phases"][:3]
    await client.post(f"{rail}/samples", json=partial[:2])
    held = (await client.get(f"{rail}/status")).json()
    assert held["phases"][3] | {"share": 0} == held["phases"][3] | {
        "condition": "active", "reading": "held", "reading_age_s": 2.0, "current_a": 20.0,
        "share": 0,
    }  # fmt: skip
    assert held["load_a"] == 80.0
    await client.post(f"{rail}/samples", json=partial[2:])
    status = (await client.get(f"{rail}/status")).json()
    assert status["phases"][3]["condition"] == "silent"
    assert status["phases"][3]["reading"] == "missing"
    # Silent, it is assumed to carry what the others carry: the load is not shrunk by it.
    assert status["phases"][3]["assumed_a"] == 20.0
    assert (status["load_a"], status["load_assumed_a"]) == (80.0, 20.0)
    assert status["stale_phases"] == []
    assert status["silent_phases"] == [3]
    assert status["capacity"]["counted_phases"] == [0, 1, 2]
    assert ("telemetry.gap", 3) in await kinds(client, rail)


async def test_sharing_imbalance_raised_once_and_cleared(
    client: httpx.AsyncClient, rail: str
) -> None:
    skewed = [sample(k, [28.0, 18.0, 17.0, 17.0]) for k in range(10)]  # phase 0 +40 %
    await client.post(f"{rail}/samples", json=skewed)
    await client.post(f"{rail}/samples", json=[sample(k, EVEN) for k in range(10, 20)])
    events = [e for e in await kinds(client, rail) if e[0] == "sharing.imbalance"]
    assert events == [("sharing.imbalance", 0), ("sharing.imbalance", None)]


async def test_thermal_warning_with_hysteresis(client: httpx.AsyncClient, rail: str) -> None:
    # Warning level: 125 degC limit - 10 K margin = 115 degC; hysteresis 2 K.
    temps = [100.0, 116.0, 114.0, 116.0, 112.0, 100.0]
    await client.post(
        f"{rail}/samples", json=[sample(k, EVEN, temps=t) for k, t in enumerate(temps)]
    )
    warnings = [e for e in await kinds(client, rail) if e[0] == "thermal.warning"]
    assert len(warnings) == 8  # on and off for each of 4 phases; 114 degC does not clear it


async def test_gap_in_telemetry(client: httpx.AsyncClient, rail: str) -> None:
    await client.post(f"{rail}/samples", json=[sample(0, EVEN), sample(1, EVEN), sample(40, EVEN)])
    assert ("telemetry.gap", None) in await kinds(client, rail)


async def test_input_sag_and_output_excursion(client: httpx.AsyncClient, rail: str) -> None:
    body = [
        sample(0, EVEN),
        sample(1, EVEN, vin_v=9.0),
        sample(2, EVEN, vout_v=1.1),
        sample(3, EVEN),
    ]
    await client.post(f"{rail}/samples", json=body)
    events = [e[0] for e in await kinds(client, rail)]
    assert events.count("input.undervoltage") == 2  # raised, then cleared
    assert events.count("output.excursion") == 2


async def test_status_shows_estimated_junctions_with_uncertainty(
    client: httpx.AsyncClient, rail: str
) -> None:
    await client.post(f"{rail}/samples", json=sample(0, EVEN, temps=55.0))
    first = (await client.get(f"{rail}/status")).json()["thermal"]
    more = [sample(k, EVEN, temps=55.0) for k in range(1, 40)]
    assert (await client.post(f"{rail}/samples", json=more)).status_code == 200
    later = (await client.get(f"{rail}/status")).json()["thermal"]
    assert len(later["estimated_junction_c"]) == 4
    # Readings shrink the uncertainty and pull the estimate towards them.
    assert all(b < a for a, b in zip(first["junction_std_k"], later["junction_std_k"], strict=True))
    assert all(abs(t - 55.0) < 3.0 for t in later["estimated_junction_c"])
    assert later["margin_to_limit_k"] == pytest.approx(125.0 - max(later["estimated_junction_c"]))


async def test_new_definition_waits_for_a_sample(client: httpx.AsyncClient, rail: str) -> None:
    await client.post(f"{rail}/samples", json=[sample(k, EVEN) for k in range(3)])
    body = {k: v for k, v in SMALL_RAIL.items() if k != "id"} | {"phase_count": 3}
    assert (await client.put(rail, json=body)).status_code == 200
    status = (await client.get(f"{rail}/status")).json()
    assert status["version"] == 2
    assert status["condition"] is None
    answer = await client.post(f"{rail}/samples", json=sample(3, EVEN[:3]))
    assert answer.status_code == 200, answer.text
    assert answer.json()["version"] == 2
    assert len((await client.get(f"{rail}/status")).json()["phases"]) == 3


async def test_status_ripple_with_and_without_the_lost_phase(
    client: httpx.AsyncClient, rail: str
) -> None:
    from phaseward.physics.ripple import inductor_ripple_pp_a, interleaved_ripple_ratio_even

    spec = {k: v for k, v in SMALL_RAIL.items() if k != "id"}
    spec["output"] = {"capacitance_f": 2e-3, "esr_ohm": 0.2e-3}
    assert (await client.put(rail, json=spec)).status_code == 200
    await client.post(f"{rail}/samples", json=[sample(k, EVEN) for k in range(2)])
    await client.post(f"{rail}/samples", json=tripped(2, phase=1))
    ripple = (await client.get(f"{rail}/status")).json()["ripple"]
    # Closed-form cancellation for evenly spaced phases (checked against the superposition of
    # the triangle waves in tests/reference/test_ref_interleaving.py).
    single = float(inductor_ripple_pp_a(12.0, 1.0, 220e-9, 500e3))
    duty = 1.0 / 12.0
    four = single * float(interleaved_ripple_ratio_even(4, duty))
    three = single * float(interleaved_ripple_ratio_even(3, duty))
    assert ripple["all_phases_pp_a"] == pytest.approx(four, rel=1e-9)
    assert ripple["respaced_pp_a"] == pytest.approx(three, rel=1e-9)
    assert ripple["survivors_pp_a"] > ripple["respaced_pp_a"]  # the gap cancels less
    assert ripple["survivors_pp_v"] > ripple["respaced_pp_v"] > 0
