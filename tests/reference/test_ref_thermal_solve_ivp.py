"""Reference: scipy.integrate.solve_ivp (Radau, rtol = atol = 1e-10) as an independent
integrator of the coupled network C dT/dt = -(G + diag g_amb) T + E P + g_amb T_amb.

Random networks (seeded): several phases of 1 to 4 Cauer stages on a shared board node,
temperature-dependent losses from :func:`loss_coefficients`, piecewise-constant current.

* Zero-order hold, the scheme :func:`simulate_c` implements: P_k = p0_k + s_k T_j(t_k) held
  over step k; solve_ivp integrates step by step with that power. Agreement < 1e-6 K.
* Continuous feedback, P(t) = p0 + s T_j(t) inside each constant-current segment: the ZOH
  lags by O(dt) (about 20 mK at dt = 10 ms on these millisecond junction stages); with
  dt = 0.25 ms agreement stays < 1 mK (about 0.4 mK here).
* :func:`time_to_limit_s` (continuous feedback, exact) against a solve_ivp terminal event.
"""

from collections.abc import Callable

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from phaseward.physics.losses import PhaseLossParams, loss_coefficients
from phaseward.physics.thermal import (
    CauerStages,
    FosterStages,
    ThermalNetwork,
    build_coupled_network,
    foster_to_cauer,
    simulate_c,
    steady_state_c,
    time_to_limit_s,
)

TOL = {"rtol": 1e-10, "atol": 1e-10}
AMBIENT_C = 30.0


def random_case(seed: int) -> tuple[ThermalNetwork, PhaseLossParams]:
    rng = np.random.default_rng(seed)
    n_phases = int(rng.integers(2, 5))
    chains: list[CauerStages] = []
    for _ in range(n_phases):
        stages = int(rng.integers(1, 5))
        log_tau = -2.5 + np.cumsum(rng.uniform(0.3, 1.0, stages))
        chains.append(foster_to_cauer(FosterStages(rng.uniform(0.5, 5.0, stages), 10.0**log_tau)))
    net = build_coupled_network(
        chains, board_to_ambient_k_per_w=rng.uniform(0.5, 2.0), board_c_j_per_k=rng.uniform(20, 80)
    )
    params = PhaseLossParams.build(
        n_phases,
        vin_v=12.0,
        vout_v=1.0,
        fsw_hz=500e3,
        inductance_h=150e-9,
        dcr_ohm=rng.uniform(0.1e-3, 0.3e-3, n_phases),
        rds_high_ohm=4e-3,
        rds_low_ohm=rng.uniform(0.8e-3, 1.5e-3, n_phases),
        rds_tc_per_k=0.004,
        gate_charge_c=40e-9,
        drive_v=5.0,
        core_loss_w=0.2,
    )
    return net, params


def current_trace(net: ThermalNetwork, seed: int, n_segments: int, per_segment: int) -> np.ndarray:
    rng = np.random.default_rng(seed + 100)
    levels = rng.uniform(5.0, 35.0, (n_segments, net.n_phases))
    return np.repeat(levels, per_segment, axis=0)


def affine_power(
    net: ThermalNetwork, p0: np.ndarray, slope: np.ndarray
) -> Callable[[np.ndarray], np.ndarray]:
    """Junction losses P = p0 + s T_j as a function of the node temperatures."""

    def power(temps: np.ndarray) -> np.ndarray:
        return np.asarray(p0 + slope * temps[net.junction_node])

    return power


def rhs(
    net: ThermalNetwork, power: Callable[[np.ndarray], np.ndarray]
) -> Callable[[float, np.ndarray], np.ndarray]:
    a = net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)
    g_t = net.ambient_conductance_w_per_k * AMBIENT_C

    def f(_: float, temps: np.ndarray) -> np.ndarray:
        heat = g_t - a @ temps
        heat[net.junction_node] += power(temps)
        return np.asarray(heat / net.capacitance_j_per_k)

    return f


def jacobian(net: ThermalNetwork, slope: np.ndarray) -> np.ndarray:
    a = net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)
    a[net.junction_node, net.junction_node] -= slope
    return -a / net.capacitance_j_per_k[:, None]


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_zero_order_hold_matches_step_by_step_integration(seed: int) -> None:
    net, params = random_case(seed)
    dt = 0.05
    p0, slope = loss_coefficients(params, current_trace(net, seed, 4, 30))
    temps = simulate_c(net, np.full(net.n_nodes, AMBIENT_C), dt, p0, slope, AMBIENT_C)
    state = np.full(net.n_nodes, AMBIENT_C)
    reference = [state]
    zero = np.zeros(net.n_phases)
    for k in range(p0.shape[0]):
        held = p0[k] + slope[k] * state[net.junction_node]
        sol = solve_ivp(
            rhs(net, affine_power(net, held, zero)),
            (0.0, dt),
            state,
            method="Radau",
            jac=jacobian(net, zero),
            **TOL,
        )
        state = sol.y[:, -1]
        reference.append(state)
    np.testing.assert_allclose(temps, np.array(reference), rtol=0.0, atol=1e-6)


@pytest.mark.parametrize("seed", [4, 5])
def test_continuous_feedback_within_a_millikelvin(seed: int) -> None:
    net, params = random_case(seed)
    dt, per_segment, n_segments = 0.25e-3, 4000, 4
    currents = current_trace(net, seed, n_segments, per_segment)
    p0, slope = loss_coefficients(params, currents)
    temps = simulate_c(net, np.full(net.n_nodes, AMBIENT_C), dt, p0, slope, AMBIENT_C)
    state = np.full(net.n_nodes, AMBIENT_C)
    for seg in range(n_segments):
        k = seg * per_segment
        c0, c1 = p0[k], slope[k]
        sol = solve_ivp(
            rhs(net, affine_power(net, c0, c1)),
            (0.0, per_segment * dt),
            state,
            method="Radau",
            jac=jacobian(net, c1),
            t_eval=np.arange(1, per_segment + 1) * dt,
            **TOL,
        )
        np.testing.assert_allclose(temps[k + 1 : k + per_segment + 1], sol.y.T, atol=1e-3)
        state = sol.y[:, -1]


@pytest.mark.parametrize("seed", [6, 7, 8])
def test_time_to_limit_matches_an_integration_event(seed: int) -> None:
    net, params = random_case(seed)
    p0, slope = loss_coefficients(params, np.full(net.n_phases, 30.0))
    start = np.full(net.n_nodes, AMBIENT_C)
    start[net.junction_node[0]] += 10.0  # an uneven start
    settled = steady_state_c(net, p0, slope, AMBIENT_C)[net.junction_node]
    limit = np.full(net.n_phases, AMBIENT_C + 0.8 * (settled.max() - AMBIENT_C))
    hit = time_to_limit_s(net, start, p0, slope, AMBIENT_C, limit)
    never = time_to_limit_s(
        net, start, p0, slope, AMBIENT_C, np.full(net.n_phases, 1.01 * settled.max())
    )
    assert never.time_s == np.inf

    def crossing(_: float, temps: np.ndarray) -> float:
        return float(np.max(temps[net.junction_node] - limit))

    crossing.terminal = True  # type: ignore[attr-defined]
    sol = solve_ivp(
        rhs(net, affine_power(net, p0, slope)),
        (0.0, 1e5),
        start,
        method="Radau",
        jac=jacobian(net, slope),
        events=crossing,
        **TOL,
    )
    assert sol.t_events[0].size == 1
    assert hit.time_s == pytest.approx(sol.t_events[0][0], rel=1e-6)
    assert hit.phase == int(np.argmax(sol.y_events[0][0][net.junction_node] - limit))
