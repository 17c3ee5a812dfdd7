"""Rail-level judgement at one instant: remaining capacity, N-1 screening, thermal margin
and forecast, and the rail condition that follows from them."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.monitor.conditions import ACTIVE
from phaseward.monitor.rail_model import RailModel, phase_power
from phaseward.monitor.screening import screen
from phaseward.physics.capacity import remaining_capacity
from phaseward.physics.thermal import ThermalRunaway, steady_state_c, time_to_limit_s

F64 = npt.NDArray[np.float64]

RAIL_CONDITIONS = ("nominal", "exposed", "degraded", "overloaded", "down")
OUTPUT_COLLAPSED_FRACTION = 0.5  # of nominal Vout: below this the rail is not delivering


@dataclass(frozen=True)
class Assessment:
    condition: str
    load_a: float
    capacity_a: float
    binding_phase: int | None
    binding: str
    n1_secure: bool
    n1_weakest: list[dict[str, Any]]
    n1_overloading: int  # how many of the single further losses would overload the rail
    n1_cases: int
    steady_junction_c: list[float | None]
    runaway: bool
    time_to_warning_s: float | None
    warning_phase: int | None

    def as_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


def assess(
    model: RailModel,
    *,
    codes: npt.NDArray[np.int8],
    current_a: F64,
    load_a: float,
    vout_v: float,
    weights: F64,
    nodes_c: F64,
    ambient_c: float,
) -> Assessment:
    """Judge the rail at one instant. ``codes``, ``current_a``, ``weights``: (n_phases,);
    ``nodes_c``: the thermal network's node temperatures now."""
    active = codes == ACTIVE
    limit = model.temp_limit_c
    load = float(load_a) if np.isfinite(load_a) else 0.0
    cap = remaining_capacity(
        model.network, model.losses,
        active=active[None, :], weights=weights, rated_current_a=model.rated_current_a,
        trip_current_a=model.overcurrent_limit_a, temp_limit_c=limit, ambient_c=ambient_c,
    )  # fmt: skip
    capacity = float(cap.capacity_a[0])
    kind = str(cap.binding_kind[0])
    binding_phase = int(cap.binding_phase[0]) if kind != "none" else None

    n1 = screen(
        model, active=active, weights=weights, load_a=load, nodes_c=nodes_c,
        ambient_c=ambient_c, depth=1,
    )  # fmt: skip

    cases = n1.rows()

    current = np.where(np.isfinite(current_a), current_a, 0.0)
    p0, slope = phase_power(model, current, active)
    try:
        steady = steady_state_c(model.network, p0, slope, ambient_c)
        steady_j: list[float | None] = [float(x) for x in steady[model.network.junction_node]]
        runaway = False
    except ThermalRunaway:
        steady_j, runaway = [None] * model.n_phases, True
    crossing = time_to_limit_s(
        model.network, nodes_c, p0, slope, ambient_c, np.where(active, limit, np.inf),
        horizon_s=model.rules.forecast_horizon_s,
    )  # fmt: skip
    ttl_value = float(crossing.time_s) if np.isfinite(crossing.time_s) else None
    runaway = runaway or crossing.runaway

    if not active.any() or vout_v < OUTPUT_COLLAPSED_FRACTION * model.vout_v:
        condition = "down"
    elif load > capacity or runaway or ttl_value is not None:
        condition = "overloaded"
    elif not active.all():
        condition = "degraded"
    elif not n1.secure:
        condition = "exposed"
    else:
        condition = "nominal"
    return Assessment(
        condition=condition,
        load_a=load,
        capacity_a=capacity,
        binding_phase=binding_phase,
        binding=kind,
        n1_secure=n1.secure,
        n1_weakest=cases[:3],
        n1_overloading=int(sum(row["overloads"] for row in cases)),
        n1_cases=int(n1.lost.shape[0]),
        steady_junction_c=steady_j,
        runaway=runaway,
        time_to_warning_s=ttl_value,
        warning_phase=crossing.phase if ttl_value is not None else None,
    )


def hottest_margin(
    model: RailModel, nodes_c: F64, active: npt.NDArray[np.bool_]
) -> tuple[int | None, float | None]:
    """The active phase whose estimated junction is closest to its limit, and that distance
    in K (junction limit minus estimate); (None, None) with no active phase."""
    junction = np.asarray(nodes_c)[model.network.junction_node]
    margins = np.where(active, model.junction_limit_c - junction, np.nan)
    if not np.isfinite(margins).any():
        return None, None
    phase = int(np.nanargmin(margins))
    return phase, float(margins[phase])
