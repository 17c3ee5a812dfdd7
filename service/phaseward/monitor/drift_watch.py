"""Cooling drift: the ``thermal.drift`` watch over the estimator's innovations.

Each phase, and the shared board path, is one channel of Page's CUSUM
(:mod:`phaseward.physics.drift`); the rail's ``monitor.drift_reference`` (k) and
``monitor.drift_threshold`` (h) set it. An episode opens with a ``thermal.drift`` warning
naming the channel, the extra thermal resistance estimated since the statistic last stood at
zero and its standard error, and clears (``details.cleared = true``) when the mirrored test
finds the mean innovation back at zero. The statistic, the episode and the estimate's window
are carried in the live state (``drift``), so events do not depend on how samples are cut.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.monitor.conditions import Finding
from phaseward.monitor.rail_model import MonitorRules, RailModel
from phaseward.physics.drift import (
    DriftCarry,
    DriftRun,
    InnovationScale,
    SteadyInnovation,
    drift_watch,
    extra_resistance,
    recent_resistance,
    steady_innovation,
)
from phaseward.physics.estimator import discrete_model
from phaseward.physics.thermal import ThermalNetwork

F64 = npt.NDArray[np.float64]


@dataclass(frozen=True)
class DriftInput:
    """What the test takes of a batch: z and power_w (n, n_phases), and the scale."""

    z: F64
    scale: InnovationScale
    power_w: F64


def steady(model: RailModel, step_s: float) -> SteadyInnovation | None:
    """The steady-state filter's innovation figures for one propagation step (cached); None
    when the Riccati equation has no solution in float64 (a step far below the network's
    time constants with almost no process noise): such samples stay out of the drift test."""
    return _steady(model.network, model.rules, step_s)


@lru_cache(maxsize=64)
def _steady(net: ThermalNetwork, rules: MonitorRules, step_s: float) -> SteadyInnovation | None:
    model = discrete_model(
        net, step_s, process_noise_w=rules.process_noise_w,
        sensor_noise_k=rules.sensor_noise_k, sensor_tau_s=rules.sensor_tau_s,
        sensor_offset_k=rules.sensor_offset_k,
    )  # fmt: skip
    try:
        return steady_innovation(model)
    except np.linalg.LinAlgError:
        return None


def load_carry(data: dict[str, Any] | None, n_channels: int) -> DriftCarry:
    """The carried test from the live state (fresh when absent or the phase count changed)."""
    if data is None or len(data["raised"]) != n_channels or len(data.get("recent", ())) != 4:
        return DriftCarry.fresh(n_channels)
    return DriftCarry(
        raised=np.asarray(data["raised"], dtype=bool),
        statistic=np.asarray(data["statistic"], dtype=np.float64),
        window=np.asarray(data["window"], dtype=np.float64),
        start_t_s=_floats(data["start_t_s"]),
        recent=np.asarray(data["recent"], dtype=np.float64),
    )


def _floats(values: list[float | None]) -> F64:
    return np.array([np.nan if v is None else v for v in values], dtype=np.float64)


def _nones(values: F64) -> list[float | None]:
    return [float(v) if np.isfinite(v) else None for v in values]


def watch(
    model: RailModel, given: DriftInput, t_s: F64, previous: dict[str, Any]
) -> tuple[dict[str, Any], list[Finding]]:
    """Run the test over one batch; the carried state for the live state and the findings of
    every raise and clear."""
    rules = model.rules
    carry = load_carry(previous.get("drift"), model.n_phases + 1)
    run = drift_watch(
        given.z, given.scale, given.power_w, t_s, carry,
        reference=rules.drift_reference, threshold=rules.drift_threshold,
    )  # fmt: skip
    findings = [_finding(model, run, k, c, on, t_s) for k, c, on in run.changes]
    final = run.carry
    return {
        "raised": final.raised.tolist(),
        "statistic": final.statistic.tolist(),
        "window": final.window.tolist(),
        "start_t_s": _nones(final.start_t_s),
        "recent": final.recent.tolist(),
    }, findings


def view(model: RailModel, state: dict[str, Any] | None) -> list[dict[str, Any]]:
    """Each channel's present drift state (phases in order, then the board) for status."""
    carry = load_carry(state, model.n_phases + 1)
    r, se = extra_resistance(carry.window)
    now, now_se = recent_resistance(carry.recent)
    return [
        {
            "raised": bool(carry.raised[c]),
            "statistic": float(carry.statistic[c]),
            "threshold": model.rules.drift_threshold,
            "extra_k_per_w": _sig(r[c]),
            "extra_se_k_per_w": _sig(se[c]),
            "recent_k_per_w": _sig(now[c]),
            "recent_se_k_per_w": _sig(now_se[c]),
            "since_s": None if not np.isfinite(carry.start_t_s[c]) else float(carry.start_t_s[c]),
        }
        for c in range(model.n_phases + 1)
    ]


def _finding(model: RailModel, run: DriftRun, k: int, c: int, on: bool, t_s: F64) -> Finding:
    board = c == model.n_phases
    r, se = extra_resistance(run.window[:, k, c])
    now, now_se = recent_resistance(run.recent[:, k, c])
    start = run.start_t_s[k, c]
    where = "the board's path to ambient" if board else f"phase {c}'s path to the board"
    name = "board path" if board else f"phase {c}"
    if on:
        message = (
            f"{name}: cooling drift, {_fmt(r)} +- {_fmt(se)} K/W more on {where} than the "
            f"model holds (since {float(t_s[k]) - start:.0f} s before)"
            if np.isfinite(r) and np.isfinite(start)
            else f"{name}: cooling drift, readings persistently above the model"
        )
    else:
        message = f"{name}: cooling drift gone, readings back on the model"
    return Finding(
        k, "thermal.drift", "warning" if on else "info", None if board else c, message,
        {
            "channel": "board" if board else "phase",
            "extra_k_per_w": _sig(r),
            "extra_se_k_per_w": _sig(se),
            "recent_k_per_w": _sig(now),
            "recent_se_k_per_w": _sig(now_se),
            "statistic": _sig(run.statistic[k, c]),
            "threshold": model.rules.drift_threshold,
            "since_t_s": None if not np.isfinite(start) else float(start),
            "samples": int(run.window[0, k, c]),
            "cleared": not on,
        },
    )  # fmt: skip


def _sig(x: Any) -> float | None:
    """Four significant digits (sums carried across batches round differently in the last
    bits; these digits do not), None when not finite."""
    value = float(x)
    return float(f"{value:.4g}") if np.isfinite(value) else None


def _fmt(x: Any) -> str:
    return f"{float(x):.3g}" if np.isfinite(x) else "?"
