"""Thermal forecast: the network driven forward from its present state by a load profile,
with phases lost along the way on request, by their trip current, or at their junction limit.

The profile is cut into stretches of constant load and constant set of carrying phases. The
losses are affine in junction temperature, so each stretch is a linear system solved exactly
(:func:`~phaseward.physics.thermal.piecewise_c`): temperatures, peaks and crossing times do
not depend on the horizon, the number of points or any step. A linear ramp between profile
points is cut into stretches, each held at the higher of its two ends, so a ramp errs hot and
early, never cool and late; enough of them that one stretch's step in load moves the steady
junction temperature by at most RAMP_STEP_K (at the profile's highest load, where the
temperature is steepest in the load, with the fewest phases the requested drops leave).

Cascade: at the start of every stretch each surviving phase takes its share of the load
(sharing weights renormalised over the survivors); a phase above its trip current drops at
that moment, the rest re-share, and so on until the survivors hold or none is left. A junction
reaching its limit drops its phase at that moment too: the power stage's over-temperature
shutdown is taken at the junction limit (common practice).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.monitor.rail_model import RailModel, phase_power
from phaseward.physics.thermal import (
    peak_batch,
    piecewise_c,
    propagate_c,
    steady_state_c,
    time_to_limit_batch_s,
)

F64 = npt.NDArray[np.float64]
B = npt.NDArray[np.bool_]
RAMP_STEP_K = 0.03  # K: steady junction rise per stretch of a ramp, at most (held high: hot)
RAMP_PIECES = 4096  # stretches per linear ramp of the profile, at most
MAX_STRETCHES = 20_000  # ramps are cut more coarsely when a profile would exceed this
VERDICTS = ("holds", "overloaded", "down")


@dataclass(frozen=True)
class Drop:
    phase: int
    at_s: float


@dataclass(frozen=True)
class Profile:
    """Load in A: ``stepwise`` values hold from each time to the next, otherwise linear in
    between; before the first and after the last time the end value holds."""

    times_s: F64
    values_a: F64
    stepwise: bool


@dataclass(frozen=True)
class Loss:
    """One phase leaving the rail: ``cause`` is requested, trip_current or junction_limit."""

    at_s: float
    phase: int
    cause: str
    current_a: float | None


def share_a(load_a: F64, alive: B, weights: F64) -> F64:
    """Phase currents (..., n_phases): ``load_a`` (...) shared by the alive phases in
    proportion to their weights; zero everywhere when none is alive."""
    share = np.where(alive, weights, 0.0)
    total = share.sum(axis=-1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, np.asarray(load_a)[..., None] * share / total, 0.0)


def shed(load_a: F64, alive: B, weights: F64, trip_a: F64) -> tuple[B, list[B]]:
    """Current-trip cascade at one instant for every case (...): the phases above their trip
    current drop, the survivors re-share, until none is above. Returns the survivors
    (..., n_phases) and the phases dropped at each round of the cascade."""
    rounds: list[B] = []
    alive = alive.copy()
    for _ in range(alive.shape[-1]):
        over = alive & (share_a(load_a, alive, weights) > trip_a)
        if not over.any():
            break
        rounds.append(over)
        alive &= ~over
    return alive, rounds


def _base_edges(profile: Profile, horizon_s: float, kelvin_per_amp: float) -> tuple[F64, F64]:
    """Stretch starts within [0, horizon) and the load held over each, before any drop;
    ``kelvin_per_amp``: steady junction rise per amp of load at most (see the docstring)."""
    t, v = profile.times_s, profile.values_a
    if profile.stepwise or t.size == 1:
        starts = np.r_[0.0, t[(t > 0.0) & (t < horizon_s)]]
        return starts, v[np.clip(np.searchsorted(t, starts, side="right") - 1, 0, None)]
    wanted = np.ceil(np.abs(np.diff(v)) * kelvin_per_amp / RAMP_STEP_K)
    cap = max(MAX_STRETCHES // (t.size - 1), 1)
    per_ramp = np.clip(np.nan_to_num(wanted, nan=RAMP_PIECES), 1, min(cap, RAMP_PIECES))
    per_ramp = np.where(np.diff(v) == 0, 1, per_ramp).astype(np.intp)
    ramp = np.repeat(np.arange(t.size - 1), per_ramp)
    k = np.arange(ramp.size) - np.repeat(np.cumsum(per_ramp) - per_ramp, per_ramp)
    width = (t[ramp + 1] - t[ramp]) / per_ramp[ramp]
    lo, hi = t[ramp] + k * width, t[ramp] + (k + 1) * width
    held = np.maximum(np.interp(lo, t, v), np.interp(hi, t, v))  # the higher end: hot
    lo, hi = np.r_[-np.inf, lo, t[-1]], np.r_[t[0], hi, np.inf]
    held = np.r_[v[0], held, v[-1]]
    use = (hi > 0.0) & (lo < horizon_s)
    return np.maximum(lo[use], 0.0), held[use]


def _requested_any(drops: Sequence[Drop], n_phases: int) -> B:
    """The phases some requested drop takes out, (n_phases,) bool."""
    out = np.zeros(n_phases, dtype=bool)
    out[[d.phase for d in drops]] = True
    return out


def _kelvin_per_amp(
    model: RailModel, alive: B, weights: F64, top_a: float, ambient_c: float
) -> float:
    """Largest steady junction rise per amp of rail load near ``top_a`` shared by ``alive``
    (losses grow faster than the load, so that is where it is steepest); inf where there is
    no steady state."""
    if not alive.any() or top_a <= 0.0:  # nothing carries the load: any cut will do
        return 0.0
    loads = np.array([top_a * (1.0 - 1e-3), top_a])
    p0, slope = phase_power(model, share_a(loads, alive, weights), alive)
    temps, runaway = steady_state_c(model.network, p0, slope, ambient_c, runaway="flag")
    if runaway.any():
        return float("inf")
    rise = temps[1, model.network.junction_node] - temps[0, model.network.junction_node]
    return float(np.max(rise) / (loads[1] - loads[0]))


PAST_ANY_LIMIT_C = 1e6  # degC: stands in for a temperature past float range (runaway)


def forecast(
    model: RailModel,
    *,
    active: B,
    weights: F64,
    nodes_c: F64,
    ambient_c: float,
    profile: Profile,
    drops: Sequence[Drop],
    horizon_s: float,
    points: int,
) -> dict[str, Any]:
    """Stretches, cascade, verdict, crossings, peak and a trajectory of at most about
    ``points`` rows (evenly spaced plus the peak and every stretch edge that fits)."""
    net = model.network
    n = model.n_phases
    base_starts, base_load = _base_edges(
        profile, horizon_s, _kelvin_per_amp(model, active & ~_requested_any(drops, n), weights,
                                            float(np.max(profile.values_a)), ambient_c),
    )  # fmt: skip
    requested = np.full(n, np.inf)
    for d in drops:
        requested[d.phase] = min(requested[d.phase], d.at_s)
    losses = [
        Loss(float(requested[k]), int(k), "requested", None)
        for k in np.argsort(requested, kind="stable")
        if requested[k] < horizon_s and active[k]
    ]
    out_at = np.where(active, requested, -np.inf)  # a phase already out never carries load
    # Each pass moves one or more phases' out time strictly earlier, or ends the cascade; a
    # phase may move more than once (a later trip found earlier), hence the generous bound.
    for _ in range(4 * n + 8):
        extra = out_at[np.isfinite(out_at) & (out_at > 0.0) & (out_at < horizon_s)]
        starts = np.unique(np.r_[base_starts, extra])
        duration = np.diff(np.r_[starts, horizon_s])
        load = base_load[np.searchsorted(base_starts, starts, side="right") - 1]
        alive = out_at[None, :] > starts[:, None]
        current = share_a(load, alive, weights)
        p0, slope = phase_power(model, current, alive)
        # Whichever pass is the last, what is judged below belongs to one phase set.
        ends = piecewise_c(net, nodes_c, duration, p0, slope, ambient_c)
        # A runaway may pass float range within a long stretch: every later start is then
        # beyond any limit, which a huge finite temperature says on the hot side.
        ends = np.nan_to_num(ends, nan=PAST_ANY_LIMIT_C, posinf=PAST_ANY_LIMIT_C,
                             neginf=PAST_ANY_LIMIT_C)  # fmt: skip
        over = alive & (current > model.overcurrent_limit_a)
        if over.any():  # one round of the instant cascade; the next pass re-shares
            k = int(np.argmax(over.any(axis=1)))
            for p in np.flatnonzero(over[k]):
                out_at[p] = starts[k]
                losses.append(Loss(float(starts[k]), int(p), "trip_current", float(current[k, p])))
            continue
        limit = np.where(alive, model.junction_limit_c, np.inf)
        hot = time_to_limit_batch_s(
            net, ends[:-1], p0, slope, ambient_c, limit, horizon_s=np.maximum(duration, 1e-300)
        )
        # A crossing at a stretch's very end is the next stretch's start (found there): judged
        # on the absolute time, as the drop is stamped, so rounding cannot drop a phase again
        # at the time it is already out (that looped until the bound, found by the fuzz).
        hit = starts + hot.time_s < np.r_[starts[1:], horizon_s]
        if not hit.any():
            break
        k = int(np.argmax(hit))
        phase, at = int(hot.phase[k]), float(starts[k] + hot.time_s[k])
        out_at[phase] = at
        losses.append(Loss(at, phase, "junction_limit", None))

    warning = time_to_limit_batch_s(
        net, ends[:-1], p0, slope, ambient_c, np.where(alive, model.temp_limit_c, np.inf),
        horizon_s=np.maximum(duration, 1e-300),
    )  # fmt: skip
    first_warning = np.flatnonzero(warning.time_s < duration)
    t_warning = (
        float(starts[first_warning[0]] + warning.time_s[first_warning[0]])
        if first_warning.size
        else None
    )
    limit_losses = [x for x in losses if x.cause == "junction_limit"]

    def worst(offset: F64) -> tuple[F64, npt.NDArray[np.intp], F64]:
        peaks = peak_batch(net, ends[:-1], p0, slope, ambient_c, offset, duration_s=duration)
        return peaks.value, peaks.phase, peaks.time_s

    peak_v, peak_p, peak_t = worst(np.zeros(n))
    to_warning = -worst(np.where(alive, model.temp_limit_c, np.inf))[0]
    to_limit = -worst(np.where(alive, model.junction_limit_c, np.inf))[0]
    top = int(np.argmax(peak_v))
    peak_at = float(starts[top] + peak_t[top])

    above_rating = alive & (current > model.rated_current_a)
    down = ~alive.any(axis=1)
    verdict, verdict_at, cause = "holds", None, None
    if down.any():
        verdict, verdict_at = "down", float(starts[int(np.argmax(down))])
        cause = "no phase left to carry the load"
    else:
        candidates: list[tuple[float, str]] = []
        if above_rating.any():
            k = int(np.argmax(above_rating.any(axis=1)))
            first = int(np.argmax(above_rating[k]))
            candidates.append((float(starts[k]), f"phase {first} above its current rating"))
        if t_warning is not None:
            candidates.append(
                (
                    t_warning,
                    f"phase {int(warning.phase[first_warning[0]])} reaches its warning line",
                )
            )
        trips = [x for x in losses if x.cause != "requested"]
        if trips:
            candidates.append((trips[0].at_s, f"phase {trips[0].phase} trips ({trips[0].cause})"))
        if candidates:
            verdict = "overloaded"
            verdict_at, cause = min(candidates)

    # The trajectory: evenly spaced rows plus the peak, the crossings and the stretch edges.
    marks = [peak_at, *(x.at_s for x in losses)] + ([t_warning] if t_warning is not None else [])
    edges = starts[1:] if starts.size <= points // 4 else np.empty(0)
    extra = np.unique(np.clip(np.r_[marks, edges], 0.0, horizon_s))
    n_even = max(points - extra.size, 2)
    for _ in range(4):  # evenly spaced rows that, with the marks, make ``points`` rows
        t_rows = np.unique(np.r_[np.linspace(0.0, horizon_s, n_even), extra])
        if t_rows.size >= points or n_even >= points:
            break
        n_even += points - t_rows.size
    row_of = np.searchsorted(starts, t_rows, side="right") - 1
    nodes = propagate_c(
        net, ends[row_of], p0[row_of], slope[row_of], ambient_c, (t_rows - starts[row_of])[:, None]
    )[:, 0]
    finite = np.isfinite(nodes).all(axis=1)
    keep = np.arange(int(np.argmin(finite)) if not finite.all() else finite.size)
    steady, runaway = steady_state_c(net, p0[-1], slope[-1], ambient_c, runaway="flag")

    def smallest_finite(values: F64) -> float | None:
        ok = values[np.isfinite(values)]
        return float(ok.min()) if ok.size else None

    return {
        "verdict": verdict,
        "verdict_at_s": verdict_at,
        "verdict_cause": cause,
        "runaway": bool(runaway) or not finite.all(),
        "time_s": t_rows[keep].tolist(),
        "junction_c": nodes[keep][:, net.junction_node].tolist(),
        "board_c": nodes[keep, net.board_node].tolist(),
        "load_a": load[row_of[keep]].tolist(),
        "time_to_warning_s": t_warning,
        "warning_phase": int(warning.phase[first_warning[0]]) if first_warning.size else None,
        "time_to_limit_s": limit_losses[0].at_s if limit_losses else None,
        "limit_phase": limit_losses[0].phase if limit_losses else None,
        "peak": {"time_s": peak_at, "phase": int(peak_p[top]), "temp_c": float(peak_v[top])}
        if np.isfinite(peak_v[top])
        else None,
        "steady_junction_c": None if runaway else steady[net.junction_node].tolist(),
        "margin_to_warning_k": smallest_finite(to_warning),
        "margin_to_limit_k": smallest_finite(to_limit),
        "cascade": [
            {"at_s": x.at_s, "phase": x.phase, "cause": x.cause, "current_a": x.current_a}
            for x in sorted(losses, key=lambda x: x.at_s)
        ],
        "stretches": [
            {
                "from_s": float(starts[k]),
                "to_s": float(starts[k] + duration[k]),
                "load_a": float(load[k]),
                "active_phases": np.flatnonzero(alive[k]).tolist(),
                "current_a": current[k].tolist(),
                "above_rating": np.flatnonzero(above_rating[k]).tolist(),
                "above_trip": [
                    x.phase for x in losses if x.cause == "trip_current" and x.at_s == starts[k]
                ],
                "peak_c": float(peak_v[k]) if np.isfinite(peak_v[k]) else None,
                "peak_phase": int(peak_p[k]),
            }
            for k in range(starts.size)
        ],
    }
