"""Time-limited ratings against brute-force bisection with scipy.integrate.solve_ivp.

Reference: for one case (a four-phase rail losing a phase from a warm state), the highest
constant load found by bisection on the load, each trial integrating
C dT/dt = -(G + diag g_amb) T + g_amb T_amb + E (p0 + s T_j) with scipy.integrate.solve_ivp
(Radau, rtol 1e-9) and a terminal event where an active junction reaches its warning line.
The kernel must agree within 0.5 % and never exceed the reference (it reports the safe end).

The property test asks the same of random rails, states, losses and durations more cheaply:
solve_ivp (same settings) must find no warning-line crossing at the kernel's rating less
1e-6, and, where the warning line binds, must find one at the rating plus 0.5 %.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from scipy.integrate import solve_ivp
from tests.factories import SMALL_RAIL, rail_spec

from phaseward.api.schemas.rails import RailBody
from phaseward.monitor.forecast import share_a
from phaseward.monitor.rail_model import RailModel, build, phase_power
from phaseward.physics.capacity import time_limited_ratings
from phaseward.physics.thermal import steady_state_c

AMBIENT = 60.0


@pytest.mark.parametrize("duration", [20.0, 120.0, 900.0])
def test_rating_matches_bisection_with_solve_ivp(duration: float) -> None:
    spec = rail_spec(phase={**rail_spec()["phase"], "rated_current_a": 60.0,
                            "overcurrent_limit_a": 70.0})  # fmt: skip
    model = build(
        "ref", 1, RailBody.model_validate({k: v for k, v in spec.items() if k != "id"}).stored()
    )
    net = model.network
    weights = np.array([1.1, 0.9, 1.0, 1.05])
    everyone = np.ones(4, dtype=bool)
    p0, s = phase_power(model, share_a(np.array(70.0), everyone, weights), everyone)
    start = steady_state_c(net, p0, s, AMBIENT)
    alive = np.array([True, False, True, True])  # phase 1 lost now
    ours = time_limited_ratings(
        net, model.losses, active=alive[None, :], weights=weights,
        rated_current_a=model.rated_current_a, trip_current_a=model.overcurrent_limit_a,
        warning_c=model.temp_limit_c, initial_c=start, ambient_c=AMBIENT,
        duration_s=[duration],
    )  # fmt: skip
    a = net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)
    j = net.junction_node

    def holds(load: float) -> bool:
        current = share_a(np.array(load), alive, weights)
        if np.any(current > np.minimum(model.rated_current_a, model.overcurrent_limit_a)):
            return False
        q0, qs = phase_power(model, current, alive)

        def rhs(_t: float, x: np.ndarray) -> np.ndarray:
            heat = net.ambient_conductance_w_per_k * AMBIENT - a @ x
            heat[j] += q0 + qs * x[j]
            return heat / net.capacitance_j_per_k

        def reaches(_t: float, x: np.ndarray) -> float:
            return float(np.max(np.where(alive, x[j] - model.temp_limit_c, -1e9)))

        reaches.terminal = True  # type: ignore[attr-defined]
        sol = solve_ivp(rhs, (0.0, duration), start, method="Radau", rtol=1e-9, atol=1e-9,
                        events=reaches)  # fmt: skip
        return sol.t_events[0].size == 0

    lo, hi = 0.0, 300.0
    assert holds(lo)
    assert not holds(hi)
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if holds(mid) else (lo, mid)
    rating = float(ours.rating_a[0, 0])
    assert rating <= hi * (1 + 1e-9)  # never above the reference
    assert rating == pytest.approx(lo, rel=0.005)
    assert ours.binding_kind[0, 0] == "warning_line"


def _holds(
    model: RailModel, *, alive: np.ndarray, weights: np.ndarray, start: np.ndarray,
    ambient: float, load: float, duration: float,
) -> bool:  # fmt: skip
    """solve_ivp's verdict: no active junction reaches its warning line within the duration."""
    net = model.network
    a = net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)
    j = net.junction_node
    q0, qs = phase_power(model, share_a(np.array(load), alive, weights), alive)

    def rhs(_t: float, x: np.ndarray) -> np.ndarray:
        heat = net.ambient_conductance_w_per_k * ambient - a @ x
        heat[j] += q0 + qs * x[j]
        return heat / net.capacitance_j_per_k

    def reaches(_t: float, x: np.ndarray) -> float:
        return float(np.max(np.where(alive, x[j] - model.temp_limit_c, -1e9)))

    reaches.terminal = True  # type: ignore[attr-defined]
    if reaches(0.0, start) >= 0.0:
        return False
    sol = solve_ivp(rhs, (0.0, duration), start, method="Radau", rtol=1e-9, atol=1e-9,
                    events=reaches)  # fmt: skip
    return sol.t_events[0].size == 0


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    phases=st.integers(2, 6),
    stages=st.lists(
        st.tuples(st.floats(0.5, 6.0), st.floats(0.01, 60.0)),
        min_size=1,
        max_size=3,
        unique_by=lambda s: round(np.log10(s[1]), 1),
    ),
    board_r=st.floats(0.2, 2.0),
    rds_tc=st.floats(0.0, 0.008),
    lose=st.booleans(),
    duration=st.floats(0.0, 3.9).map(lambda e: float(10.0**e)),  # 1 s to 2 h
    seed=st.integers(0, 2**16),
)
def test_ratings_never_above_solve_ivp(
    phases: int, stages: list[tuple[float, float]], board_r: float, rds_tc: float,
    lose: bool, duration: float, seed: int,
) -> None:  # fmt: skip
    rng = np.random.default_rng(seed)
    phase: dict[str, Any] = dict(SMALL_RAIL["phase"], rated_current_a=60.0,
                                 overcurrent_limit_a=70.0)  # fmt: skip
    phase["thermal"] = [{"r_k_per_w": r, "tau_s": t} for r, t in sorted(stages, key=lambda s: s[1])]
    phase["power_stage"] = dict(phase["power_stage"], rds_tc_per_k=rds_tc)
    board = {"to_ambient_k_per_w": board_r, "capacitance_j_per_k": 300.0}
    spec = rail_spec(phase_count=phases, phase=phase, board=board)
    model = build(
        "ref", 1, RailBody.model_validate({k: v for k, v in spec.items() if k != "id"}).stored()
    )
    weights = rng.uniform(0.85, 1.15, phases)
    everyone = np.ones(phases, dtype=bool)
    p0, s = phase_power(model, share_a(np.array(15.0 * phases), everyone, weights), everyone)
    start = steady_state_c(model.network, p0, s, AMBIENT)
    start[model.network.junction_node] += rng.uniform(0.0, 10.0, phases)  # not settled
    alive = everyone.copy()
    if lose:
        alive[rng.integers(phases)] = False
    ours = time_limited_ratings(
        model.network, model.losses, active=alive[None, :], weights=weights,
        rated_current_a=model.rated_current_a, trip_current_a=model.overcurrent_limit_a,
        warning_c=model.temp_limit_c, initial_c=start, ambient_c=AMBIENT,
        duration_s=[duration],
    )  # fmt: skip
    rating, kind = float(ours.rating_a[0, 0]), str(ours.binding_kind[0, 0])
    event(kind)
    case = {"model": model, "alive": alive, "weights": weights, "start": start,
            "ambient": AMBIENT, "duration": duration}  # fmt: skip
    if rating > 0.0:
        assert _holds(load=rating * (1 - 1e-6), **case)  # never above the reference
    if kind == "warning_line":
        assert not _holds(load=rating * 1.005 + 1e-9, **case)  # and within 0.5 % of it
