"""Mission reliability: will the rail still carry its rated load after the mission time?

Each phase fails at a constant rate, its FIT at the reference temperature accelerated by the
Arrhenius factor at the junction temperature it would run at carrying its share of the rated
load (JEDEC JEP122). The rail survives while enough phases survive: k-out-of-n with the exact
Poisson-binomial distribution for non-identical phases. The same for each N-1 case.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.errors import Conflict
from phaseward.monitor.live import LiveRail
from phaseward.monitor.rail_model import RailModel, phase_power
from phaseward.physics.capacity import loss_cases, remaining_capacity
from phaseward.physics.constants import DEVICE_HOURS_PER_FIT
from phaseward.physics.reliability import (
    failure_rate_per_h,
    k_out_of_n_survival,
    mean_time_to_failure_h,
    survival_probability,
)
from phaseward.physics.thermal import steady_state_c

F64 = npt.NDArray[np.float64]
MAX_SUBSETS = 5000  # loss combinations checked per depth when finding the phases needed


def phases_needed(
    model: RailModel, active: npt.NDArray[np.bool_], weights: F64, ambient_c: float
) -> int:
    """Fewest survivors that carry the rated load whichever phases they are: the active count
    minus the deepest loss that every combination survives. Deeper losses are checked until
    one combination fails (if d losses can fail, d + 1 can). Beyond MAX_SUBSETS combinations
    a depth is counted as failing, which can only overstate the phases needed."""
    n_active = int(active.sum())
    depth = 0
    while depth < n_active:
        masks = loss_cases(model.n_phases, depth, active=active)[0] if depth else active[None, :]
        if masks.shape[0] > MAX_SUBSETS:
            break
        cap = remaining_capacity(
            model.network, model.losses, active=masks, weights=weights,
            rated_current_a=model.rated_current_a, trip_current_a=model.overcurrent_limit_a,
            temp_limit_c=model.temp_limit_c, ambient_c=ambient_c,
        )  # fmt: skip
        if (cap.capacity_a < model.load_a).any():
            break
        depth += 1
    return n_active - depth + 1 if depth else n_active + 1


def mission(live: LiveRail, hours: float) -> dict[str, Any]:
    model = live.model
    rel = model.reliability
    if rel is None:
        raise Conflict(
            "the rail definition has no reliability section (fit_at_ref, ref_c)",
            field="reliability",
        )
    singles, lost = loss_cases(model.n_phases, 1, active=live.active)
    masks = np.concatenate([live.active[None, :], singles])
    ambient = live.ambient_c
    needed = np.array([phases_needed(model, m, live.weights, ambient) for m in masks])
    share = np.where(masks, live.weights, 0.0)
    current = model.load_a * share / np.maximum(share.sum(axis=1, keepdims=True), 1e-300)
    p0, slope = phase_power(model, current, masks)
    steady, runaway = steady_state_c(model.network, p0, slope, ambient, runaway="flag")
    junction = steady[:, model.network.junction_node]
    # A steady state beyond float range is no steady state either.
    runaway = runaway | (masks & ~np.isfinite(junction)).any(axis=1)
    working = masks & ~runaway[:, None]
    rates = np.where(
        working,
        failure_rate_per_h(rel.fit_at_ref, np.where(working, junction, rel.ref_c),
                           ref_temp_c=rel.ref_c, activation_ev=rel.activation_ev),
        np.inf,
    )  # fmt: skip
    survive = k_out_of_n_survival(survival_probability(rates, hours), needed)
    mttf = mean_time_to_failure_h(rates, needed)

    def case(j: int) -> dict[str, Any]:
        return {
            "phases_needed": int(needed[j]),
            "survival_probability": float(survive[j]),
            "failure_probability": float(1.0 - survive[j]),
            "mttf_h": float(mttf[j]) if np.isfinite(mttf[j]) else None,
            "runaway": bool(runaway[j]),
            "junction_c": [
                float(x) if m else None for x, m in zip(junction[j], working[j], strict=True)
            ],
            "fit": [float(r * DEVICE_HOURS_PER_FIT) if np.isfinite(r) else None for r in rates[j]],
        }

    return {
        "hours": hours,
        "rated_load_a": model.load_a,
        "fit_at_ref": rel.fit_at_ref,
        "ref_c": rel.ref_c,
        "activation_ev": rel.activation_ev,
        "present": case(0),
        "n_minus_1": [
            {"lose_phase": int(lost[j - 1, 0]), **case(j)} for j in range(1, masks.shape[0])
        ],
    }
