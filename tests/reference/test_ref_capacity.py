"""Reference: remaining capacity against the rule of thumb and against brute force.

* Common practice: N equal phases sharing equally, rated I_rated each, deliver
  (N - 1) I_rated after one loss (N - 2 after two) when the thermal limit does not bind.
* Where the thermal limit binds, the capacity must agree with a brute-force scan: rail
  current on a fine ``np.linspace`` grid, steady state by :func:`steady_state_c` at every
  grid point, capacity = the last grid point with every active junction within its limit.
  Agreement to the grid resolution.
"""

import numpy as np
import pytest

from phaseward.physics.capacity import loss_cases, remaining_capacity
from phaseward.physics.losses import PhaseLossParams, loss_coefficients
from phaseward.physics.thermal import (
    CauerStages,
    FosterStages,
    ThermalNetwork,
    build_coupled_network,
    foster_to_cauer,
    steady_state_c,
)

AMBIENT_C = 35.0


def rail(n: int, seed: int | None = None) -> tuple[ThermalNetwork, PhaseLossParams]:
    rng = np.random.default_rng(seed)
    spread = (lambda lo, hi: rng.uniform(lo, hi, n)) if seed is not None else (lambda lo, hi: lo)
    scale = np.broadcast_to(spread(1.0, 1.6), n)
    chains: list[CauerStages] = [
        foster_to_cauer(FosterStages(np.array([1.0, 4.0]) * k, np.array([0.01, 3.0])))
        for k in scale
    ]
    net = build_coupled_network(chains, board_to_ambient_k_per_w=0.4, board_c_j_per_k=400.0)
    params = PhaseLossParams.build(
        n,
        vin_v=12.0,
        vout_v=0.9,
        fsw_hz=600e3,
        inductance_h=120e-9,
        dcr_ohm=0.15e-3,
        rds_high_ohm=3e-3,
        rds_low_ohm=spread(0.9e-3, 1.3e-3),
        rds_tc_per_k=0.0045,
        rise_time_s=4e-9,
        fall_time_s=4e-9,
        gate_charge_c=50e-9,
        drive_v=5.0,
        dead_time_s=15e-9,
        diode_drop_v=0.7,
        core_loss_w=0.25,
    )
    return net, params


@pytest.mark.parametrize("n", [2, 4, 8, 12])
def test_equal_phases_lose_one_rating_per_lost_phase(n: int) -> None:
    net, params = rail(n)
    singles, _ = loss_cases(n, 1)
    pairs, _ = loss_cases(n, 2)
    active = np.vstack([np.ones((1, n), dtype=bool), singles, pairs])
    res = remaining_capacity(
        net,
        params,
        active=active,
        weights=np.ones(n),
        rated_current_a=np.full(n, 30.0),
        temp_limit_c=np.full(n, 150.0),  # far above what 30 A per phase reaches
        ambient_c=AMBIENT_C,
    )
    expected = 30.0 * np.concatenate(
        [[n], np.full(len(singles), n - 1), np.full(len(pairs), n - 2)]
    )
    np.testing.assert_allclose(res.capacity_a, expected, rtol=1e-12)
    assert set(res.binding_kind[: 1 + n].tolist()) == {"rating"}


def brute_force_capacity(
    net: ThermalNetwork,
    params: PhaseLossParams,
    active: np.ndarray,
    share: np.ndarray,
    limit: np.ndarray,
    grid: np.ndarray,
) -> float:
    p0, slope = loss_coefficients(params, grid[:, None] * share)
    temps, runaway = steady_state_c(net, p0 * active, slope * active, AMBIENT_C, runaway="flag")
    within = ~runaway & np.all((temps[:, net.junction_node] <= limit) | ~active, axis=1)
    return float(grid[np.flatnonzero(within).max()])


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_thermal_capacity_agrees_with_a_brute_force_scan(seed: int) -> None:
    n = 6
    net, params = rail(n, seed)
    rng = np.random.default_rng(seed)
    weights = rng.uniform(0.8, 1.2, n)
    limit = rng.uniform(75.0, 90.0, n)
    singles, _ = loss_cases(n, 1)
    res = remaining_capacity(
        net,
        params,
        active=singles,
        weights=weights,
        rated_current_a=np.full(n, 60.0),
        temp_limit_c=limit,
        ambient_c=AMBIENT_C,
    )
    grid = np.linspace(0.0, 400.0, 40001)  # 0.01 A steps
    for k, active in enumerate(singles):
        share = weights * active / np.sum(weights * active)
        expected = brute_force_capacity(net, params, active, share, limit, grid)
        assert res.binding_kind[k] == "warning_line"
        assert expected < 60.0 / share.max()  # the current rating is not what binds
        assert res.capacity_a[k] == pytest.approx(expected, abs=0.01)
