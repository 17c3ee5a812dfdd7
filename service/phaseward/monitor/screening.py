"""N-1 (and N-2) screening: what losing each further phase, or pair, would leave."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.monitor.forecast import share_a, shed
from phaseward.monitor.rail_model import RailModel, phase_power
from phaseward.physics.capacity import loss_cases, remaining_capacity
from phaseward.physics.thermal import propagate_c, steady_state_c, time_to_limit_batch_s

F64 = npt.NDArray[np.float64]


@dataclass(frozen=True)
class Screening:
    """One row per case, (n_cases,) arrays; ``lost`` is (n_cases, depth)."""

    depth: int
    load_a: float
    lost: npt.NDArray[np.intp]
    capacity_a: F64
    binding_phase: npt.NDArray[np.intp]
    binding: npt.NDArray[np.str_]
    steady_hottest_c: F64  # NaN: no steady state (thermal runaway)
    runaway: npt.NDArray[np.bool_]
    time_to_warning_s: F64  # inf: not within the horizon
    warning_phase: npt.NDArray[np.intp]

    @property
    def headroom_a(self) -> F64:
        return self.capacity_a - self.load_a

    @property
    def secure(self) -> bool:
        """No case overloads: capacity covers the load and no limit is forecast."""
        failing = (self.headroom_a < 0) | self.runaway | np.isfinite(self.time_to_warning_s)
        return bool(self.lost.shape[0] > 0 and not failing.any())

    def rows(self) -> list[dict[str, Any]]:
        order = np.argsort(self.capacity_a, kind="stable")
        return [
            {
                "lose_phases": self.lost[j].tolist(),
                "capacity_a": float(self.capacity_a[j]),
                "headroom_a": float(self.headroom_a[j]),
                "binding_phase": int(self.binding_phase[j]) if self.binding[j] != "none" else None,
                "binding": str(self.binding[j]),
                "steady_hottest_c": _finite_or_none(self.steady_hottest_c[j]),
                "runaway": bool(self.runaway[j]),
                "time_to_warning_s": _finite_or_none(self.time_to_warning_s[j]),
                "warning_phase": int(self.warning_phase[j]) if self.warning_phase[j] >= 0 else None,
                "overloads": bool(
                    self.headroom_a[j] < 0
                    or self.runaway[j]
                    or np.isfinite(self.time_to_warning_s[j])
                ),
            }
            for j in order
        ]


def _finite_or_none(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None


def screen(
    model: RailModel,
    *,
    active: npt.NDArray[np.bool_],
    weights: F64,
    load_a: float,
    nodes_c: F64,
    ambient_c: float,
    depth: int,
) -> Screening:
    """Lose every ``depth``-combination of the active phases now, at the present load.

    The survivors take the load in proportion to their learned sharing weights; each case's
    capacity, steady state and time to the limit (from the present node temperatures) come
    from one batched call of each kernel.
    """
    masks, lost = loss_cases(model.n_phases, depth, active=active)
    if masks.shape[0] == 0:  # fewer active phases than the depth asks to lose
        none = np.empty(0)
        return Screening(
            depth=depth, load_a=float(load_a), lost=lost, capacity_a=none,
            binding_phase=none.astype(np.intp), binding=none.astype(np.str_),
            steady_hottest_c=none, runaway=none.astype(bool), time_to_warning_s=none,
            warning_phase=none.astype(np.intp),
        )  # fmt: skip
    cap = remaining_capacity(
        model.network, model.losses, active=masks, weights=weights,
        rated_current_a=model.rated_current_a, trip_current_a=model.overcurrent_limit_a,
        temp_limit_c=model.temp_limit_c,
        ambient_c=ambient_c,
    )  # fmt: skip
    share = np.where(masks, weights, 0.0)
    total = share.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        current = np.where(total > 0, load_a * share / total, 0.0)
    p0, slope = phase_power(model, current, masks)
    steady, runaway = steady_state_c(model.network, p0, slope, ambient_c, runaway="flag")
    junction = steady[:, model.network.junction_node]
    hottest = np.where(runaway, np.nan, np.where(masks, junction, -np.inf).max(axis=1))
    limits = np.where(masks, model.temp_limit_c, np.inf)
    crossing = time_to_limit_batch_s(
        model.network, nodes_c, p0, slope, ambient_c, limits,
        horizon_s=model.rules.forecast_horizon_s,
    )  # fmt: skip
    return Screening(
        depth=depth,
        load_a=float(load_a),
        lost=lost,
        capacity_a=cap.capacity_a,
        binding_phase=cap.binding_phase,
        binding=cap.binding_kind,
        steady_hottest_c=np.where(np.isfinite(hottest), hottest, np.nan),
        runaway=runaway | crossing.runaway,
        time_to_warning_s=crossing.time_s,
        warning_phase=crossing.phase,
    )


def cascades(
    model: RailModel,
    *,
    lost: npt.NDArray[np.intp],
    active: npt.NDArray[np.bool_],
    weights: F64,
    load_a: float,
    nodes_c: F64,
    ambient_c: float,
) -> list[dict[str, Any]]:
    """What each loss case sets off at the present load within the forecast horizon: the
    current-trip cascade at once (:func:`~phaseward.monitor.forecast.shed`), then a phase
    whose junction reaches its limit drops at that moment and the rest re-share, round by
    round for all cases together. Per case: the steps (time, phase, cause) and when the
    rail is down (None: it holds)."""
    n_cases = lost.shape[0]
    alive = np.repeat(active[None, :], n_cases, axis=0)
    alive[np.arange(n_cases)[:, None], lost] = False
    horizon = model.rules.forecast_horizon_s
    state = np.repeat(np.asarray(nodes_c, dtype=np.float64)[None, :], n_cases, axis=0)
    at = np.zeros(n_cases)
    going = np.ones(n_cases, dtype=bool)
    steps: list[list[dict[str, Any]]] = [[] for _ in range(n_cases)]
    load = np.full(n_cases, float(load_a))
    for _ in range(model.n_phases + 1):
        before = alive
        alive, rounds = shed(load, alive, weights, model.overcurrent_limit_a)
        for over in rounds:
            amps = share_a(load, before, weights)
            for c, p in np.argwhere(over & going[:, None]):
                steps[c].append(
                    {"at_s": float(at[c]), "phase": int(p), "cause": "trip_current",
                     "current_a": float(amps[c, p])}
                )  # fmt: skip
            before = before & ~over
        going &= alive.any(axis=1)
        if not going.any():
            break
        rows = np.flatnonzero(going)
        p0, slope = phase_power(model, share_a(load[rows], alive[rows], weights), alive[rows])
        hit = time_to_limit_batch_s(
            model.network, state[rows], p0, slope, ambient_c,
            np.where(alive[rows], model.junction_limit_c, np.inf),
            horizon_s=np.maximum(horizon - at[rows], 1e-9),
        )  # fmt: skip
        more = np.isfinite(hit.time_s)
        going[rows[~more]] = False
        if not more.any():
            break
        rows, p0, slope, dt = rows[more], p0[more], slope[more], hit.time_s[more]
        state[rows] = propagate_c(model.network, state[rows], p0, slope, ambient_c, dt[:, None])[
            :, 0
        ]
        at[rows] += dt
        for c, p in zip(rows.tolist(), hit.phase[more].tolist(), strict=True):
            alive[c, p] = False
            steps[c].append(
                {
                    "at_s": float(at[c]),
                    "phase": int(p),
                    "cause": "junction_limit",
                    "current_a": None,
                }
            )
    down = np.asarray(~alive.any(axis=1), dtype=bool)
    return [
        {"cascade": steps[c], "down_at_s": float(at[c]) if down[c] else None}
        for c in range(n_cases)
    ]
