"""Forecast against scipy.integrate.solve_ivp on the same network and load profile.

Reference: scipy.integrate.solve_ivp (Radau, rtol = atol = 1e-10) integrating
C dT/dt = -(G + diag g_amb) T + g_amb T_amb + E (p0 + s T_j) continuously, segment by segment
between the profile's load steps and the phase drop. The forecast holds each step's loss at the
temperature reached at its start (zero-order hold over a 12 ms step), so agreement within
10 mK over a 600 s horizon is the expected size of that difference (measured: 4.5 mK). The
time to the limit is checked against solve_ivp's event location.
"""

from __future__ import annotations

from itertools import pairwise

import numpy as np
from scipy.integrate import solve_ivp
from tests.factories import SMALL_RAIL

from phaseward.api.schemas.rails import RailBody
from phaseward.monitor.forecast import Drop, forecast
from phaseward.monitor.live import LiveRail
from phaseward.monitor.rail_model import build, phase_power
from phaseward.physics.thermal import steady_state_c

STEPS = ((0.0, 60.0), (120.0, 85.0), (400.0, 50.0))  # (from s, total load A)
DROP = Drop(phase=2, at_s=200.0)
AMBIENT = 45.0


def load_at(t: np.ndarray) -> np.ndarray:
    times = np.array([s[0] for s in STEPS])
    values = np.array([s[1] for s in STEPS])
    return values[np.searchsorted(times, t, side="right") - 1]


def test_forecast_matches_solve_ivp() -> None:
    spec = RailBody.model_validate({k: v for k, v in SMALL_RAIL.items() if k != "id"}).stored()
    model = build("ref", 1, spec)
    net = model.network
    weights = np.array([1.05, 0.95, 1.0, 1.0])
    active = np.ones(4, dtype=bool)
    p0, s = phase_power(model, 15.0 * weights, active)
    start = steady_state_c(net, p0, s, AMBIENT)
    live = LiveRail(model=model, active=active, weights=weights, load_a=60.0, nodes_c=start,
                    ambient_c=AMBIENT, t_s=None)  # fmt: skip
    result = forecast(
        live, load_at=load_at, drops=[DROP], horizon_s=600.0, points=20000, step_s=0.012
    )

    a = net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)
    c = net.capacitance_j_per_k
    j = net.junction_node

    def rhs_for(load: float, alive: np.ndarray):  # type: ignore[no-untyped-def]
        share = np.where(alive, weights, 0.0)
        q0, qs = phase_power(model, load * share / share.sum(), alive)

        def rhs(_t: float, temp: np.ndarray) -> np.ndarray:
            heat = net.ambient_conductance_w_per_k * AMBIENT - a @ temp
            heat[j] += q0 + qs * temp[j]
            return heat / c

        return rhs

    edges = sorted({0.0, 600.0, DROP.at_s, *(t for t, _ in STEPS)})
    times = np.asarray(result["time_s"])
    reference = np.empty((times.size, net.n_nodes))
    temp = start
    for lo, hi in pairwise(edges):
        alive = active & ~((np.arange(4) == DROP.phase) & (lo >= DROP.at_s))
        inside = (times >= lo) & (times <= hi)
        sol = solve_ivp(rhs_for(float(load_at(np.array([lo]))[0]), alive), (lo, hi), temp,
                        method="Radau", rtol=1e-10, atol=1e-10, t_eval=times[inside],
                        dense_output=True)  # fmt: skip
        reference[inside] = sol.y.T
        temp = sol.sol(hi)
    ours = np.asarray(result["junction_c"])
    assert np.max(np.abs(ours - reference[:, j])) < 1e-2
    assert result["peak"]["temp_c"] == np.max(ours)
    assert np.max(np.abs(np.asarray(result["board_c"]) - reference[:, net.board_node])) < 1e-2


def test_time_to_limit_matches_solve_ivp_event() -> None:
    spec = RailBody.model_validate({k: v for k, v in SMALL_RAIL.items() if k != "id"}).stored()
    model = build("ref", 1, spec)
    net = model.network
    active = np.ones(4, dtype=bool)
    weights = np.ones(4)
    p0, s = phase_power(model, np.full(4, 24.0), active)
    start = steady_state_c(net, p0, s, 70.0)
    live = LiveRail(model=model, active=active, weights=weights, load_a=96.0, nodes_c=start,
                    ambient_c=70.0, t_s=None)  # fmt: skip
    result = forecast(live, load_at=lambda t: np.full(t.shape, 96.0), drops=[DROP],
                      horizon_s=1800.0, points=500, step_s=0.036)  # fmt: skip
    alive = active & (np.arange(4) != DROP.phase)
    q0, qs = phase_power(model, np.where(alive, 96.0 / 3, 0.0), alive)
    a = net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)
    j = net.junction_node
    limit = model.temp_limit_c[0]

    def rhs(_t: float, temp: np.ndarray) -> np.ndarray:
        heat = net.ambient_conductance_w_per_k * 70.0 - a @ temp
        heat[j] += q0 + qs * temp[j]
        return heat / net.capacitance_j_per_k

    def reaches(_t: float, temp: np.ndarray) -> float:
        return float(np.max(temp[j][alive]) - limit)

    reaches.terminal = True  # type: ignore[attr-defined]
    # Before the drop the four phases sit at their steady state (96 A at 70 degC ambient);
    # after it three phases carry 32 A each and head for 121 degC, past the 115 degC limit.
    after = solve_ivp(rhs, (DROP.at_s, 1800.0), start, method="Radau", rtol=1e-10, atol=1e-10,
                      events=reaches)  # fmt: skip
    crossing = after.t_events[0][0]
    assert result["time_to_limit_s"] is not None
    assert abs(result["time_to_limit_s"] - crossing) < 0.05  # within a few 12 ms steps
