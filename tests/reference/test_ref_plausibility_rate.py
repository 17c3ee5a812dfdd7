"""Reference: scipy.integrate.solve_ivp (Radau, rtol = atol = 1e-10) integrates the coupled
network C dT/dt = -(G + diag g_amb) T + E P(T_j) + g_amb T_amb of a rail definition, and the
fastest junction change it finds bounds the plausibility gate's default temperature rate.

The gate's default is RATE_FACTOR x P(trip current, at the junction limit) / C_junction
(monitor/rail_model.py). Two worst cases, every phase at its trip current:
* heating from ambient (all flows start at zero, so the initial slope is the largest);
* cooling after the power stops from the steady state at that power (the flows out of the
  junction then equal P exactly, and decay from there).
While the junction stays below its limit, |dT_j/dt| from solve_ivp must stay below
P / C_junction, i.e. below the default divided by its margin factor.
"""

import numpy as np
from scipy.integrate import solve_ivp
from tests.factories import rail_spec

from phaseward.api.schemas.rails import RailCreate
from phaseward.monitor import rail_model
from phaseward.physics.losses import loss_coefficients
from phaseward.physics.thermal import steady_state_c

TOL = {"rtol": 1e-10, "atol": 1e-10}


def slopes(spec_changes: dict[str, object], heating: bool) -> tuple[np.ndarray, np.ndarray]:
    """max |dT_j/dt| per phase from solve_ivp while T_j <= limit, and the gate's default."""
    model = rail_model.build(
        "ref", 1, RailCreate.model_validate(rail_spec(**spec_changes)).stored()
    )
    net = model.network
    p0, slope = loss_coefficients(model.losses, model.overcurrent_limit_a)
    j = net.junction_node
    a = net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)
    c = net.capacitance_j_per_k

    def rhs(_t: float, temps: np.ndarray) -> np.ndarray:
        inject = np.zeros_like(temps)
        if heating:
            inject[j] = p0 + slope * temps[j]
        return (-a @ temps + inject + net.ambient_conductance_w_per_k * model.ambient_c) / c

    start = (
        np.full(net.n_nodes, model.ambient_c)
        if heating
        else steady_state_c(net, p0, slope, model.ambient_c)
    )
    times = np.linspace(0.0, 30.0, 3001)
    run = solve_ivp(rhs, (0.0, 30.0), start, method="Radau", t_eval=times, **TOL)
    assert run.success
    rates = np.array([rhs(t, y) for t, y in zip(run.t, run.y.T, strict=True)])[:, j]
    hot_c = run.y[j].T
    below = hot_c <= model.junction_limit_c
    fastest = np.where(below, np.abs(rates), 0.0).max(axis=0)
    return fastest, model.plausible.temp_rate_k_per_s / rail_model.RATE_FACTOR


def test_heating_from_ambient_never_outruns_the_rate_bound() -> None:
    fastest, bound = slopes({}, heating=True)
    assert (fastest > 0).all()
    assert (fastest <= bound * (1 + 1e-9)).all()
    # Nearly reached at the start, where no heat has left the junction yet: the gap is the
    # rise of the losses from ambient to the limit (Rds(on) and DCR temperature coefficients).
    assert (fastest >= 0.75 * bound).all()


def test_cooling_from_steady_state_never_outruns_the_rate_bound() -> None:
    # A cooler board so the steady state at the trip current stays below the limit.
    fastest, bound = slopes(
        {"board": {"to_ambient_k_per_w": 0.2, "capacitance_j_per_k": 200.0}}, heating=False
    )
    assert (fastest > 0).all()
    assert (fastest <= bound * (1 + 1e-9)).all()
