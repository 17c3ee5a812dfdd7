"""Calibration through the API: a known network recovered from a synthetic heating curve,
applied as a new rail version; refusals that name the field.

Reference for the synthetic curve: the Foster step response T(t) = T0 + P sum R_i (1 - e^(-t/tau_i))
(JEDEC JESD51 definition of Zth), evaluated with numpy.
"""

from __future__ import annotations

from typing import Any

import httpx
import numpy as np
import pytest
from tests.factories import SMALL_RAIL

pytestmark = pytest.mark.anyio
R, TAU = np.array([2.0, 6.0]), np.array([0.5, 20.0])  # the factory rail's own network


def curve(power_w: float, seed: int = 3) -> dict[str, Any]:
    t = np.linspace(0.0, 150.0, 600)
    rise = power_w * (R * (1 - np.exp(-t[:, None] / TAU))).sum(axis=1)
    noise = np.random.default_rng(seed).normal(0.0, 0.02, t.size)
    return {"t_s": t.tolist(), "temp_c": (25.0 + rise + noise).tolist()}


@pytest.fixture
async def rail(client: httpx.AsyncClient) -> str:
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    return "/v1/rails/bench-a"


async def test_recovers_a_two_stage_network_and_applies_it(
    client: httpx.AsyncClient, rail: str
) -> None:
    body = curve(3.0) | {"power_w": 3.0, "orders": [1, 2, 3], "apply": "phase", "phase": 2}
    answer = await client.post(f"{rail}/calibrations", json=body)
    assert answer.status_code == 200, answer.text
    fit = answer.json()
    assert fit["order"] == 2
    stages = fit["chosen"]["stages"]
    assert [s["r_k_per_w"] for s in stages] == pytest.approx(R.tolist(), rel=0.02)
    assert [s["tau_s"] for s in stages] == pytest.approx(TAU.tolist(), rel=0.03)
    lo, hi = stages[1]["tau_ci_s"]
    assert lo < TAU[1] < hi
    assert fit["applied_version"] == 2
    stored = (await client.get(rail)).json()["spec"]
    (override,) = stored["overrides"]
    assert override["index"] == 2
    assert [s["tau_s"] for s in override["thermal"]] == [s["tau_s"] for s in stages]


async def test_power_from_the_phase_current(client: httpx.AsyncClient, rail: str) -> None:
    from phaseward.api.schemas.rails import RailBody
    from phaseward.monitor.calibrations import power_of
    from phaseward.monitor.rail_model import build

    spec = RailBody.model_validate({k: v for k, v in SMALL_RAIL.items() if k != "id"}).stored()
    watts = power_of(build("bench-a", 1, spec), 0, 25.0, 40.0)
    body = curve(watts) | {"current_a": 25.0, "orders": [2]}
    fit = (await client.post(f"{rail}/calibrations", json=body)).json()
    assert fit["power_w"] == pytest.approx(
        power_of(build("bench-a", 1, spec), 0, 25.0, float(np.mean(body["temp_c"])))
    )
    assert fit["applied_version"] is None


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"power_w": None}, "body"),
        ({"location": "sensor", "apply": "all"}, "apply"),
        ({"phase": 9}, "phase"),
        ({"orders": [5]}, "orders[0]"),
        ({"temp_c": [25.0] * 10}, "body"),
    ],
)
async def test_bad_calibrations(
    client: httpx.AsyncClient, rail: str, change: dict[str, Any], field: str
) -> None:
    body = curve(3.0) | {"power_w": 3.0} | change
    answer = await client.post(f"{rail}/calibrations", json=body)
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
    assert (await client.get(rail)).json()["version"] == 1


# --- issue 18 -------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("change", "field", "cause"),
    [
        ({"cooling": True}, "temp_c", "looks like a heating curve"),
        ({"t_s": list(range(8)), "temp_c": [25.0 + k for k in range(8)]}, "t_s",
         "fit no order"),  # 8 samples, T_ref fitted: order 1 needs 12
        ({"t_s": [0.0] * 600}, "t_s", "strictly increasing"),
    ],
)  # fmt: skip
async def test_calibration_refusals_name_the_field(
    client: httpx.AsyncClient, rail: str, change: dict[str, Any], field: str, cause: str
) -> None:
    body = curve(3.0) | {"power_w": 3.0, "orders": [1, 2]} | change
    answer = await client.post(f"{rail}/calibrations", json=body)
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field  # no stray colon ("t_s:")
    assert cause in answer.json()["detail"]


async def test_an_unsettled_curve_is_flagged_and_not_applied(
    client: httpx.AsyncClient, rail: str
) -> None:
    """Cut at 10 s the 20 s stage is far from its end."""
    full = curve(3.0)
    short = {k: v[:40] for k, v in full.items()}  # 0 .. 9.8 s
    body = short | {"power_w": 3.0, "orders": [1, 2]}
    fit = (await client.post(f"{rail}/calibrations", json=body)).json()
    assert fit["settled"] is False
    assert "3 times the slowest" in fit["settled_rule"]
    assert any(w.startswith("not settled") for w in fit["warnings"])
    refused = await client.post(f"{rail}/calibrations", json=body | {"apply": "phase"})
    assert (refused.status_code, refused.json()["field"]) == (422, "apply")
    assert (await client.get(rail)).json()["version"] == 1
    settled = (await client.post(f"{rail}/calibrations", json=full | {"power_w": 3.0})).json()
    assert settled["settled"] is True
    low, high = settled["chosen"]["total_r_ci_k_per_w"]
    assert 0.0 < low < R.sum() < high


async def test_a_curve_fit_needs_no_rail(client: httpx.AsyncClient) -> None:
    body = curve(3.0) | {"power_w": 3.0, "orders": [1, 2, 3]}
    answer = await client.post("/v1/tools/calibrations", json=body)
    assert answer.status_code == 200, answer.text
    assert answer.json()["order"] == 2
    in_ms = body | {"t_s": [t * 1000 for t in body["t_s"]], "time_unit": "ms"}
    same = (await client.post("/v1/tools/calibrations", json=in_ms)).json()
    assert same["chosen"]["total_r_k_per_w"] == pytest.approx(
        answer.json()["chosen"]["total_r_k_per_w"], rel=1e-6
    )
    unflagged = await client.post("/v1/tools/calibrations", json=in_ms | {"time_unit": "s"})
    assert any("milliseconds" in w for w in unflagged.json()["warnings"])
    wrong_ref = (await client.post("/v1/tools/calibrations",
                                   json=body | {"reference_temp_c": 24.0})).json()  # fmt: skip
    assert wrong_ref["reference_offset_k"] == pytest.approx(1.0, abs=0.05)
    assert any("reference temperature" in w for w in wrong_ref["warnings"])
