"""Declared current sharing, per-phase sense calibration, and capacity that noise cannot move."""

from __future__ import annotations

from typing import Any

import httpx
import numpy as np
import pytest
from scipy.signal import lfilter
from tests.factories import SMALL_RAIL, rail_spec, sample

from phaseward.api.schemas.rails import RailBody
from phaseward.monitor import rail_model
from phaseward.monitor.sharing import SHARE_NOISE_FLOOR, ewma_std, learn

pytestmark = pytest.mark.anyio
RAIL = "/v1/rails/bench-a"


def model_of(**changes: Any) -> rail_model.RailModel:
    body = rail_spec(**changes)
    del body["id"]
    return rail_model.build("m", 1, RailBody.model_validate(body).stored())


def test_learning_is_the_ewma_recursion_from_the_declared_targets() -> None:
    """Against the recursion written out sample by sample (the EWMA's definition, Roberts
    1959): z_k = (1 - r) z_(k-1) + r x_k over the samples that teach, from the target."""
    rate = 0.3
    model = model_of(
        monitor={"share_learning_rate": rate},
        overrides=[{"index": 0, "share_target": 1.5}, {"index": 3, "share_target": 0.5}],
    )
    rng = np.random.default_rng(3)
    current = 20.0 + rng.normal(0.0, 2.0, (40, 4))
    current[10:15] = 1.0  # light load: teaches nothing
    active = np.ones((40, 4), dtype=bool)
    active[20:25, 1] = False  # phase 1 isolated for a while: it keeps what it learned
    start = model.share_target
    got = learn(
        model, active, current, weights=start, learned=start, var=np.full(4, 1e-4)
    )  # fmt: skip

    z, v = start.copy(), np.full(4, 1e-4)
    for k in range(40):
        carried = np.where(active[k], current[k], 0.0)
        total = carried.sum()
        if total <= model.rules.min_share_load_fraction * 30.0 * active[k].sum():
            continue
        x = carried / total * active[k].sum()
        for i in np.flatnonzero(active[k]):
            v[i] = (1 - rate) * v[i] + rate * (x[i] - z[i]) ** 2 * (2 - rate) / 2
            z[i] = (1 - rate) * z[i] + rate * x[i]
    assert start.tolist() == pytest.approx([1.5, 1.0, 1.0, 0.5])  # mean 1 over the phases
    np.testing.assert_allclose(got.learned, z, rtol=1e-12)
    np.testing.assert_allclose(got.var, v, rtol=1e-12)


@pytest.mark.parametrize("rate", [0.05, 0.2, 0.6])
def test_the_spread_of_an_ewma_against_a_simulation(rate: float) -> None:
    """The significance limit rests on sigma sqrt(rate / (2 - rate)); numpy's generator and
    scipy's filter as the reference, 200,000 samples (the estimate is good to about 1 %)."""
    x = np.random.default_rng(1).normal(0.0, 0.7, 200_000)
    z = lfilter([rate], [1.0, rate - 1.0], x)[1000:]
    assert float(np.std(z)) == pytest.approx(float(ewma_std(np.array(0.7), rate)), rel=0.03)


def test_noise_never_moves_the_used_shares_and_a_real_shift_does() -> None:
    model = model_of(phase_count=6, load_a=150.0)
    rng = np.random.default_rng(11)
    steady = 25.0 + rng.normal(0.0, 0.3, (5000, 6))  # 1.2 % of a phase's current
    active = np.ones((5000, 6), dtype=bool)
    equal = np.ones(6)
    calm = learn(
        model, active, steady, weights=equal, learned=equal,
        var=np.full(6, SHARE_NOISE_FLOOR**2),
    )  # fmt: skip
    assert calm.weights.tolist() == equal.tolist()
    assert np.abs(calm.learned - 1.0).max() > 0.005  # the learned shares do wander

    shifted = steady.copy()
    shifted[:, 0] *= 1.08  # phase 0 now takes 8 % more than the others
    moved = learn(
        model, active[:300], shifted[:300], weights=calm.weights, learned=calm.learned,
        var=calm.var,
    )  # fmt: skip
    expected = 1.08 * 6 / 6.08
    assert moved.weights[0] == pytest.approx(expected, abs=0.025)
    assert moved.weights[0] > 1.04


async def capacity(client: httpx.AsyncClient) -> float:
    status = (await client.get(f"{RAIL}/status")).json()
    value: float = status["capacity"]["capacity_a"]
    return value


async def test_capacity_stays_fixed_under_a_noisy_steady_trace(client: httpx.AsyncClient) -> None:
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    rng = np.random.default_rng(5)
    seen = []
    for start in range(0, 400, 50):
        body = [
            sample(k, (22.5 + rng.normal(0.0, 0.25, 4)).tolist()) for k in range(start, start + 50)
        ]
        answer = await client.post(f"{RAIL}/samples", json=body)
        assert answer.status_code == 200, answer.text
        seen.append(await capacity(client))
    assert len(set(seen)) == 1, seen  # not a hundredth of an amp of jitter
    phases = (await client.get(f"{RAIL}/status")).json()["phases"]
    assert [p["share"] for p in phases] == [0.25] * 4
    assert [p["share_learned"] for p in phases] != [0.25] * 4  # what the noise did teach
    assert seen[0] == pytest.approx(120.0)  # four 30 A phases sharing equally

    for start in range(400, 600, 50):  # phase 0 now carries 26 A of the 90 A
        body = [
            sample(k, (np.array([26.0, 64 / 3, 64 / 3, 64 / 3]) + rng.normal(0.0, 0.25, 4))
                   .tolist())
            for k in range(start, start + 50)
        ]  # fmt: skip
        assert (await client.post(f"{RAIL}/samples", json=body)).status_code == 200
    assert await capacity(client) == pytest.approx(30.0 * 90.0 / 26.0, rel=0.03)


def _skewed_rail(**phase0: Any) -> dict[str, Any]:
    spec = rail_spec()
    spec["overrides"] = [{"index": 0, **phase0}] if phase0 else []
    return spec


async def test_a_new_rail_starts_from_its_declared_shares(client: httpx.AsyncClient) -> None:
    assert (await client.post("/v1/rails", json=_skewed_rail(share_target=1.3))).status_code == 201
    light = sample(0, [5.0, 5.0, 5.0, 5.0])  # too light a load to teach anything
    assert (await client.post(f"{RAIL}/samples", json=[light])).status_code == 200
    phases = (await client.get(f"{RAIL}/status")).json()["phases"]
    for key in ("share", "share_learned", "share_declared"):
        assert [p[key] for p in phases] == pytest.approx([1.3 / 4.3, 1 / 4.3, 1 / 4.3, 1 / 4.3])
    assert await capacity(client) == pytest.approx(30.0 * 4.3 / 1.3)


@pytest.mark.parametrize(("declared", "events"), [(None, 1), (1.4, 0)])
async def test_a_declared_skew_is_no_imbalance(
    client: httpx.AsyncClient, declared: float | None, events: int
) -> None:
    spec = _skewed_rail(share_target=declared) if declared else _skewed_rail()
    assert (await client.post("/v1/rails", json=spec)).status_code == 201
    per = 90.0 / 4.4
    body = [sample(k, [1.4 * per, per, per, per]) for k in range(10)]  # 27 % above equal
    assert (await client.post(f"{RAIL}/samples", json=body)).status_code == 200
    page = await client.get(f"{RAIL}/events", params={"kind": "sharing.imbalance"})
    assert len(page.json()["items"]) == events


async def test_sense_gain_and_offset_calibrate_every_reading(client: httpx.AsyncClient) -> None:
    spec = rail_spec()
    spec["overrides"] = [{"index": 2, "sense_gain": 2.0, "sense_offset_a": 1.0}]
    assert (await client.post("/v1/rails", json=spec)).status_code == 201
    item = sample(0, [10.0, 10.0, 10.0, 10.0])
    item["phases"][3] = {"index": 3, "sense_v": 3e-3, "temp_c": 20.0}  # 10 A through 0.3 mOhm
    item["phases"][2] = {"index": 2, "sense_v": 3e-3, "temp_c": 20.0}
    assert (await client.post(f"{RAIL}/samples", json=[item])).status_code == 200
    window = await client.get(f"{RAIL}/samples", params={"since": 0, "until": 4e9})
    assert window.json()["current_a"][0] == pytest.approx([10.0, 10.0, 21.0, 10.0])
    status = (await client.get(f"{RAIL}/status")).json()
    assert status["phases"][2]["current_a"] == pytest.approx(21.0)
