"""The present state of a rail, as analyses start from it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from sqlalchemy.orm import Session

from phaseward.errors import Conflict
from phaseward.monitor import rail_model
from phaseward.monitor import rails as rail_service
from phaseward.monitor.rail_model import RailModel, phase_power
from phaseward.physics.thermal import ThermalRunaway, steady_state_c
from phaseward.store import state

F64 = npt.NDArray[np.float64]


@dataclass(frozen=True)
class LiveRail:
    model: RailModel
    active: npt.NDArray[np.bool_]
    weights: F64
    load_a: float
    nodes_c: F64
    ambient_c: float
    t_s: float | None


def live_rail(session: Session, rail_id: str) -> LiveRail:
    """The rail as of its newest sample; with no telemetry yet (or a new definition since),
    all phases active, the declared sharing, the rated load, and the network at its steady
    state."""
    rail, spec = rail_service.get(session, rail_id)
    model = rail_model.build(rail.id, rail.version, spec)
    row = state.get(session, rail_id)
    if row is not None and row.version == rail.version:
        s = row.state
        return LiveRail(
            model=model,
            active=np.array([p["condition"] == "active" for p in s["phases"]]),
            weights=np.asarray(s["watch"]["weights"], dtype=np.float64),
            load_a=float(s["rail"]["load_a"]),
            nodes_c=np.asarray(s["nodes_c"], dtype=np.float64),
            ambient_c=float(s["sample"]["ambient_c"]),
            t_s=float(s["sample"]["t_s"]),
        )
    active = np.ones(model.n_phases, dtype=bool)
    share = model.load_a * model.share_target / model.share_target.sum()
    p0, slope = phase_power(model, share, active)
    try:
        nodes = steady_state_c(model.network, p0, slope, model.ambient_c)
    except ThermalRunaway as err:
        raise Conflict(
            "the rated load has no thermal steady state on this definition", field="load_a"
        ) from err
    return LiveRail(
        model=model, active=active, weights=model.share_target, load_a=model.load_a,
        nodes_c=nodes, ambient_c=model.ambient_c, t_s=None,
    )  # fmt: skip
