"""Time-limited ratings against brute-force bisection with scipy.integrate.solve_ivp.

Reference: for one case (a four-phase rail losing a phase from a warm state), the highest
constant load found by bisection on the load, each trial integrating
C dT/dt = -(G + diag g_amb) T + g_amb T_amb + E (p0 + s T_j) with scipy.integrate.solve_ivp
(Radau, rtol 1e-9) and a terminal event where an active junction reaches its warning line.
The kernel must agree within 0.5 % and never exceed the reference (it reports the safe end).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from tests.factories import rail_spec

from phaseward.api.schemas.rails import RailBody
from phaseward.monitor.forecast import share_a
from phaseward.monitor.rail_model import build, phase_power
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
