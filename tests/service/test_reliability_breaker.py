"""Mission reliability and breaker stress through the API, against scipy and hand math.

References: scipy.stats.binom for k-out-of-n of identical phases; the JEDEC JEP122 Arrhenius
model with the Boltzmann constant from scipy.constants; the k-out-of-n MTTF of identical
exponential units, sum over i = k..n of 1 / (i lambda) (textbook result, from memory);
a single-stage Foster network's step response P R (1 - exp(-t / tau)) by hand.
"""

from __future__ import annotations

import math
from typing import Any

import httpx
import pytest
from scipy import constants, stats
from tests.factories import rail_spec, sample

pytestmark = pytest.mark.anyio
RELIABILITY = {"fit_at_ref": 200.0, "ref_c": 55.0, "activation_ev": 0.7}


def accelerated_rate_per_h(temp_c: float) -> float:
    k_ev = constants.value("Boltzmann constant in eV/K")
    t, ref = temp_c + constants.zero_Celsius, 55.0 + constants.zero_Celsius
    return 200.0e-9 * math.exp(0.7 / k_ev * (1.0 / ref - 1.0 / t))


async def test_identical_phases_match_the_binomial(client: httpx.AsyncClient) -> None:
    assert (
        await client.post("/v1/rails", json=rail_spec(reliability=RELIABILITY))
    ).status_code == 201
    await client.post("/v1/rails/bench-a/samples", json=[sample(k, [20.0] * 4) for k in range(3)])
    answer = await client.get("/v1/rails/bench-a/reliability", params={"hours": 50_000})
    assert answer.status_code == 200, answer.text
    body = answer.json()
    present = body["present"]
    # 90 A rated: three 30 A phases carry it, two do not -> 3 of 4 needed.
    assert present["phases_needed"] == 3
    temp = present["junction_c"][0]
    assert all(t == pytest.approx(temp) for t in present["junction_c"])
    rate = accelerated_rate_per_h(temp)
    p = math.exp(-rate * 50_000)
    assert present["survival_probability"] == pytest.approx(stats.binom.sf(2, 4, p), rel=1e-9)
    assert present["mttf_h"] == pytest.approx(1 / (3 * rate) + 1 / (4 * rate), rel=1e-8)
    assert present["fit"][0] == pytest.approx(rate * 1e9, rel=1e-9)
    # After losing one, all three survivors are needed and each runs hotter.
    assert len(body["n_minus_1"]) == 4
    case = body["n_minus_1"][0]
    assert case["phases_needed"] == 3
    hot = [t for t in case["junction_c"] if t is not None]
    assert min(hot) > temp
    p_hot = [math.exp(-accelerated_rate_per_h(t) * 50_000) for t in hot]
    assert case["survival_probability"] == pytest.approx(math.prod(p_hot), rel=1e-9)
    assert "monitoring aid" in body["caution"]


async def test_reliability_needs_its_section(client: httpx.AsyncClient) -> None:
    await client.post("/v1/rails", json=rail_spec())
    answer = await client.get("/v1/rails/bench-a/reliability", params={"hours": 1000})
    assert answer.status_code == 409
    assert answer.json()["field"] == "reliability"
    bad = await client.get("/v1/rails/bench-a/reliability", params={"hours": -1})
    assert bad.status_code == 422
    assert bad.json()["field"] == "hours"


BREAKER: dict[str, Any] = {
    "vin_v": 12.0,
    "current_limit_a": 10.0,
    "delay_s": 0.002,
    "foster": [{"r_k_per_w": 1.0, "tau_s": 0.01}],
    "start_temp_c": 25.0,
    "junction_limit_c": 150.0,
    "soa": [{"time_s": 0.001, "current_a": 40.0}, {"time_s": 0.1, "current_a": 4.0}],
}


async def test_breaker_stress_single_stage_by_hand(client: httpx.AsyncClient) -> None:
    answer = await client.post("/v1/tools/breaker-stress", json=BREAKER)
    assert answer.status_code == 200, answer.text
    body = answer.json()
    rise = 120.0 * 1.0 * (1 - math.exp(-0.002 / 0.01))  # P R (1 - e^(-t/tau)), by hand
    assert body["power_w"] == 120.0
    assert body["at_delay"]["rise_k"] == pytest.approx(rise, rel=1e-12)
    assert body["at_delay"]["peak_junction_c"] == pytest.approx(25.0 + rise, rel=1e-12)
    # SOA line 40 A at 1 ms to 4 A at 100 ms is I = 40 (t / 1 ms)^-0.5 on log-log axes:
    # at 2 ms, 40 / sqrt(2) = 28.28 A allowed.
    assert body["at_delay"]["soa_allowed_a"] == pytest.approx(40 / math.sqrt(2), rel=1e-9)
    assert body["at_delay"]["passes"] is True
    # 10 A allowed at t = 1 ms x (40 / 10)^2 = 16 ms; thermally 125 K of headroom is never
    # used up at 120 W x 1 K/W: the SOA binds.
    assert body["longest_safe_delay_s"] == pytest.approx(0.016, rel=1e-6)
    assert len(body["curve"]) == 50
    assert [c["passes"] for c in body["curve"]] == sorted(
        (c["passes"] for c in body["curve"]), reverse=True
    )


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"vin_v": 0}, "vin_v"),
        ({"foster": []}, "foster"),
        ({"soa": [{"time_s": 0.1, "current_a": 4.0}, {"time_s": 0.001, "current_a": 40.0}]}, "soa"),
    ],
)
async def test_breaker_bad_input(
    client: httpx.AsyncClient, change: dict[str, Any], field: str
) -> None:
    answer = await client.post("/v1/tools/breaker-stress", json=BREAKER | change)
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
