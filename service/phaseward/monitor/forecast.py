"""Thermal forecast: the network driven forward from its present state by a load profile,
with phases optionally lost along the way."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from itertools import pairwise
from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.monitor.live import LiveRail
from phaseward.monitor.rail_model import phase_power
from phaseward.physics.thermal import ThermalRunaway, simulate_c, steady_state_c, time_to_limit_s

F64 = npt.NDArray[np.float64]
# Resolution: the propagation is exact for power held over a step, so the step only limits
# how finely load changes and the loss's temperature feedback are placed in time. By default
# a forecast takes DEFAULT_STEPS steps (24 h: 17 s, 1 h: 0.7 s); a client may ask for finer
# steps up to MAX_STEPS.
DEFAULT_STEPS = 5_000
MAX_STEPS = 200_000
MIN_STEP_S = 0.01
SUBSTEPS = 8


@dataclass(frozen=True)
class Drop:
    phase: int
    at_s: float


def step_for(horizon_s: float, requested_s: float | None = None) -> float:
    """The step of a forecast: the requested one, kept within MIN_STEP_S and MAX_STEPS."""
    wanted = horizon_s / DEFAULT_STEPS if requested_s is None else requested_s
    return max(wanted, horizon_s / MAX_STEPS, MIN_STEP_S)


def forecast(
    live: LiveRail,
    *,
    load_at: Callable[[F64], F64],
    drops: Sequence[Drop],
    horizon_s: float,
    points: int,
    ambient_c: float | None = None,
    step_s: float | None = None,
) -> dict[str, Any]:
    """Trajectory of every junction and the board, decimated to at most ``points`` rows
    (the hottest sample of each bucket is kept, so the peak survives), the first time any
    junction reaches its limit, and the steady state at the end of the profile."""
    model, net = live.model, live.model.network
    ambient = live.ambient_c if ambient_c is None else ambient_c
    dt = step_for(horizon_s, step_s)
    n = int(np.ceil(horizon_s / dt))
    t: F64 = np.arange(n, dtype=np.float64) * dt
    # Each step holds its mean loss: the profile and the drops are evaluated at SUBSTEPS
    # points inside the step, so a load step or a drop between grid points moves energy by
    # at most dt / SUBSTEPS instead of a whole step.
    sub = (t[:, None] + (np.arange(SUBSTEPS) + 0.5) * dt / SUBSTEPS).ravel()
    # The loss model runs once per run of equal (load, set of active phases): a profile of
    # steps holds few runs, and the loss kernel is the costly part of a long forecast.
    dropped_at = np.full(model.n_phases, np.inf)
    for d in drops:
        dropped_at[d.phase] = min(dropped_at[d.phase], d.at_s)
    drop_times = np.unique(dropped_at[np.isfinite(dropped_at)])
    era = np.searchsorted(drop_times, sub, side="right")  # how many drop times have passed
    load_sub = load_at(sub)
    starts = np.flatnonzero(np.r_[True, (np.diff(load_sub) != 0) | (np.diff(era) != 0)])
    alive_u = live.active & (dropped_at[None, :] > np.r_[-np.inf, drop_times][era[starts], None])
    share = np.where(alive_u, live.weights, 0.0)
    total = share.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        current_u = np.where(total > 0, load_sub[starts, None] * share / total, 0.0)
    p_u, s_u = phase_power(model, current_u, alive_u)
    lengths = np.diff(np.r_[starts, sub.size])
    p_sub, s_sub = np.repeat(p_u, lengths, axis=0), np.repeat(s_u, lengths, axis=0)
    alive = np.repeat(alive_u, lengths, axis=0)
    p0: F64 = p_sub.reshape(n, SUBSTEPS, -1).mean(axis=1)
    slope: F64 = s_sub.reshape(n, SUBSTEPS, -1).mean(axis=1)
    active = alive.reshape(n, SUBSTEPS, -1).any(axis=1)
    load = load_at(t)
    limit = np.where(active, model.temp_limit_c, np.inf)
    out: dict[str, Any] = {"dt_s": dt, "runaway": False}
    try:
        nodes = simulate_c(net, live.nodes_c, dt, p0, slope, ambient)
    except ThermalRunaway:
        # The loss feedback diverges on the way: report when the limit is crossed by the
        # exact solution of the final conditions, and no trajectory that would mean nothing.
        hit = time_to_limit_s(net, live.nodes_c, p0[-1], slope[-1], ambient, limit[-1])
        return out | {
            "runaway": True, "time_s": [], "junction_c": [], "board_c": [], "load_a": [],
            "time_to_limit_s": float(hit.time_s) if np.isfinite(hit.time_s) else None,
            "limit_phase": hit.phase if np.isfinite(hit.time_s) else None,
            "peak": None, "steady_junction_c": None, "margin_k": None,
        }  # fmt: skip
    junction = nodes[:, net.junction_node]
    time_all = np.append(t, n * dt)
    over = junction[1:] >= limit  # state at the end of step k against step k's limits
    crossed = over.any(axis=1)
    ttl: float | None = None
    limit_phase: int | None = None
    if crossed.any():
        k = int(np.argmax(crossed))  # first step that ends above a limit: refine inside it
        hit = time_to_limit_s(net, nodes[k], p0[k], slope[k], ambient, limit[k], horizon_s=dt)
        ttl = float(t[k] + (hit.time_s if np.isfinite(hit.time_s) else dt))
        limit_phase = hit.phase if hit.phase >= 0 else int(np.argmax(junction[k + 1] - limit[k]))
    hottest = junction.max(axis=1)
    keep = _keep_peaks(hottest, points)
    steady, runaway = steady_state_c(net, p0[-1], slope[-1], ambient, runaway="flag")
    peak_row = int(np.argmax(hottest))
    margins = np.where(np.isfinite(limit), limit - junction[1:], np.inf).min(axis=0)
    return out | {
        "runaway": bool(runaway),
        "time_s": time_all[keep].tolist(),
        "junction_c": junction[keep].tolist(),
        "board_c": nodes[keep, net.board_node].tolist(),
        "load_a": np.append(load, load[-1])[keep].tolist(),
        "time_to_limit_s": ttl,
        "limit_phase": limit_phase,
        "peak": {
            "time_s": float(time_all[peak_row]),
            "phase": int(np.argmax(junction[peak_row])),
            "temp_c": float(hottest[peak_row]),
        },
        "steady_junction_c": None if runaway else steady[net.junction_node].tolist(),
        "margin_k": float(margins[np.isfinite(margins)].min())
        if np.isfinite(margins).any()
        else None,
    }


def _keep_peaks(series: F64, points: int) -> npt.NDArray[np.intp]:
    """Indices of at most ``points`` rows: the first, the last, and the maximum of each of
    ``points - 2`` equal buckets in between (so the global peak is always kept)."""
    n = series.shape[0]
    if n <= points:
        return np.arange(n)
    buckets = max(points - 2, 1)
    edges = np.linspace(1, n - 1, buckets + 1).astype(np.intp)
    edges[-1] = n - 1
    inner = [lo + int(np.argmax(series[lo:hi])) for lo, hi in pairwise(edges) if hi > lo]
    return np.unique(np.concatenate([[0], inner, [n - 1]]).astype(np.intp))
