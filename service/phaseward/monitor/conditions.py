"""Phase condition, sharing and threshold watches over a batch of samples, vectorised.

Codes (stored in the live state as words, in arrays as int8): see ``PHASE_CONDITIONS``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import signal

from phaseward.monitor.rail_model import RailModel
from phaseward.monitor.sequences import changes, debounce, latch
from phaseward.monitor.telemetry import ISOLATING_FLAGS, SampleBatch

F64 = npt.NDArray[np.float64]

PHASE_CONDITIONS = ("active", "isolated", "suspect", "silent")
ACTIVE, ISOLATED, SUSPECT, SILENT = range(4)

# Plausibility bounds for a reading without a fault flag (common practice: a sensor that
# reads far beyond what the hardware's own protection allows is more likely broken).
SUSPECT_OVERCURRENT_FACTOR = 2.0
SUSPECT_REVERSE_FRACTION = 0.5  # of rated current, flowing backwards
SUSPECT_TEMP_BELOW_AMBIENT_K = 15.0
SUSPECT_TEMP_ABOVE_LIMIT_K = 60.0
SHARE_SMOOTHING = 0.2  # weight of each new sample in the running sharing estimate


@dataclass
class Watch:
    """State carried from one batch to the next."""

    codes: list[int]
    tail: list[list[int]]
    weights: list[float]
    thermal: list[bool]
    imbalance: bool = False
    undervoltage: bool = False
    excursion: bool = False
    last_t_s: float | None = None

    @classmethod
    def fresh(cls, n_phases: int) -> Watch:
        return cls(
            codes=[ACTIVE] * n_phases,
            tail=[],
            weights=[1.0] * n_phases,
            thermal=[False] * n_phases,
        )

    @classmethod
    def load(cls, data: dict[str, Any], n_phases: int) -> Watch:
        watch = cls(**data)
        if len(watch.codes) != n_phases:  # definition changed the phase count
            return cls.fresh(n_phases)
        return watch


@dataclass(frozen=True)
class Finding:
    """One event before it is stored."""

    sample: int
    kind: str
    severity: str
    phase: int | None
    message: str
    details: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Judgement:
    codes: npt.NDArray[np.int8]  # (n, n_phases) debounced phase conditions
    load_a: F64  # (n,) total output current
    weights: F64  # (n, n_phases) sharing weights after each sample
    findings: list[Finding]
    watch: Watch


def judge(model: RailModel, batch: SampleBatch, prev: Watch) -> Judgement:
    """Conditions and findings for a batch of in-order samples newer than the live state."""
    rules = model.rules
    cur, temp = batch.current_a, batch.temp_c
    ambient = np.where(np.isfinite(batch.ambient_c), batch.ambient_c, model.ambient_c)
    flagged = (batch.flags & ISOLATING_FLAGS) != 0

    load = np.where(np.isfinite(batch.iout_a), batch.iout_a, np.nansum(cur, axis=1))
    others_mean = _mean_of_others(np.where(flagged | ~batch.present, np.nan, np.abs(cur)))
    collapsed = (np.abs(cur) < rules.collapse_fraction * others_mean) & (
        others_mean > rules.collapse_fraction * model.rated_current_a
    )
    implausible = (
        ~np.isfinite(cur)
        | (cur > SUSPECT_OVERCURRENT_FACTOR * model.overcurrent_limit_a)
        | (cur < -SUSPECT_REVERSE_FRACTION * model.rated_current_a)
        | (temp < ambient[:, None] - SUSPECT_TEMP_BELOW_AMBIENT_K)
        | (temp > model.junction_limit_c + SUSPECT_TEMP_ABOVE_LIMIT_K)
    )
    raw = np.select(
        [~batch.present, flagged, implausible, collapsed],
        [SILENT, ISOLATED, SUSPECT, ISOLATED],
        ACTIVE,
    ).astype(np.int8)
    width = rules.debounce_samples - 1
    tail = np.full((width, model.n_phases), -1, dtype=np.int8)
    if width and prev.tail:
        known = np.asarray(prev.tail, dtype=np.int8)[-width:]
        tail[width - known.shape[0] :] = known
    codes = debounce(
        raw,
        tail=tail,
        prev=np.asarray(prev.codes, dtype=np.int8),
        length=rules.debounce_samples,
        immediate=flagged & batch.present,
    )

    findings: list[Finding] = []
    findings += _phase_findings(codes, np.asarray(prev.codes, np.int8), cur, temp, batch.flags)
    findings += _gap_findings(batch.t_s, prev.last_t_s, rules.gap_s)

    weights, imbalance_pct, worst = _sharing(model, codes, cur, np.asarray(prev.weights))
    imbalance, found = _watch(
        imbalance_pct > rules.imbalance_pct, imbalance_pct < 0.8 * rules.imbalance_pct,
        prev.imbalance, "sharing.imbalance",
        lambda k, on: (
            f"phase {int(worst[k])} deviates {imbalance_pct[k]:.0f} % from an equal share"
            if on else "current sharing back within limits",
            {"deviation_pct": _r(imbalance_pct[k]), "worst_phase": int(worst[k])},
            int(worst[k]) if on else None,
        ),
    )  # fmt: skip
    findings += found

    warn_at = model.junction_limit_c - model.warning_margin_k
    hot = latch(
        (temp > warn_at) & (codes == ACTIVE),
        temp < warn_at - rules.hysteresis_k,
        np.asarray(prev.thermal, dtype=bool),
    )
    for k, i in zip(*changes(hot, np.asarray(prev.thermal, dtype=bool)), strict=True):
        on = bool(hot[k, i])
        findings.append(
            Finding(
                int(k), "thermal.warning", "warning" if on else "info", int(i),
                f"phase {i} at {temp[k, i]:.1f} degC, warning level {warn_at[i]:.1f} degC"
                if on else f"phase {i} cooled below its warning level",
                {"temp_c": _r(temp[k, i]), "warning_c": _r(warn_at[i]), "cleared": not on},
            )
        )  # fmt: skip

    uv_frac = batch.vin_v / model.vin_v
    undervoltage, found = _watch(
        uv_frac < rules.undervoltage_fraction, uv_frac > rules.undervoltage_fraction + 0.02,
        prev.undervoltage, "input.undervoltage",
        lambda k, on: (
            f"input at {batch.vin_v[k]:.2f} V, nominal {model.vin_v:.2f} V"
            if on else "input voltage recovered",
            {"vin_v": _r(batch.vin_v[k])}, None,
        ),
    )  # fmt: skip
    findings += found
    deviation = np.abs(batch.vout_v / model.vout_v - 1.0)
    excursion, found = _watch(
        deviation > rules.excursion_fraction, deviation < 0.8 * rules.excursion_fraction,
        prev.excursion, "output.excursion",
        lambda k, on: (
            f"output at {batch.vout_v[k]:.4f} V, {100 * deviation[k]:.1f} % off nominal"
            if on else "output voltage back within its band",
            {"vout_v": _r(batch.vout_v[k]), "deviation_pct": _r(100 * deviation[k])}, None,
        ),
    )  # fmt: skip
    findings += found

    history = np.concatenate([tail, raw])[-width:] if width else raw[:0]
    watch = Watch(
        codes=[int(c) for c in codes[-1]],
        tail=history.astype(int).tolist(),
        weights=[float(w) for w in weights[-1]],
        thermal=[bool(h) for h in hot[-1]],
        imbalance=bool(imbalance[-1]),
        undervoltage=bool(undervoltage[-1]),
        excursion=bool(excursion[-1]),
        last_t_s=float(batch.t_s[-1]),
    )
    findings.sort(key=lambda f: f.sample)
    return Judgement(codes=codes, load_a=load, weights=weights, findings=findings, watch=watch)


def _r(x: Any) -> float | None:
    value = float(x)
    return round(value, 6) if np.isfinite(value) else None


def _mean_of_others(values: F64) -> F64:
    """Mean over the other phases of each sample, ignoring NaN. (n, p) -> (n, p)."""
    finite = np.isfinite(values)
    total = np.where(finite, values, 0.0).sum(axis=1, keepdims=True)
    count = finite.sum(axis=1, keepdims=True)
    own = np.where(finite, values, 0.0)
    others = count - finite
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(others > 0, (total - own) / others, np.nan)


def _sharing(
    model: RailModel, codes: npt.NDArray[np.int8], cur: F64, prev_weights: F64
) -> tuple[F64, F64, npt.NDArray[np.intp]]:
    """Running sharing weights after each sample (n, p), per-sample imbalance in % and worst
    phase.

    A weight is a phase's share relative to an equal share (1.0 = equal), so what a phase
    teaches while another is isolated still holds when it returns; capacity renormalises
    over whichever phases are active. Only samples carrying a real load teach the weights:
    at light load phase currents are dominated by ripple and offsets. An isolated phase keeps
    the weight it had.
    """
    active = codes == ACTIVE
    carried = np.where(active, cur, 0.0)
    total = carried.sum(axis=1)
    n_active = active.sum(axis=1)
    rated_active = np.where(active, model.rated_current_a, 0.0).sum(axis=1)
    informative = (total > model.rules.min_share_load_fraction * rated_active) & (n_active > 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        relative = carried / total[:, None] * n_active[:, None]
    deviation = np.where(active & informative[:, None], np.abs(relative - 1.0), 0.0) * 100.0
    imbalance = deviation.max(axis=1)
    worst = deviation.argmax(axis=1)
    # Exponential smoothing per phase over the samples that teach it, w <- keep w + a x, run
    # as a linear filter over each phase's teaching samples (a loop over phases, not samples)
    # and held between them. The recurrence is evaluated in sample order with the previous
    # batch's last weight as its start, so the weights are the same however the samples were
    # cut into batches.
    teach = active & informative[:, None]
    keep = 1.0 - SHARE_SMOOTHING
    # A phase driving current backwards (a sinking fault, read before it is isolated) carries
    # no share of the load: it teaches a weight of 0, never a negative one.
    taught = np.maximum(relative, 0.0)
    weights = np.empty(cur.shape)
    for i in range(cur.shape[1]):
        rows = np.flatnonzero(teach[:, i])
        if rows.size == 0:
            weights[:, i] = prev_weights[i]
            continue
        smoothed = signal.lfilter(
            [SHARE_SMOOTHING], [1.0, -keep], taught[rows, i], zi=[keep * prev_weights[i]]
        )[0]
        last = np.cumsum(teach[:, i]) - 1
        weights[:, i] = np.where(last >= 0, smoothed[np.maximum(last, 0)], prev_weights[i])
    return weights, imbalance, worst


def _phase_findings(
    codes: npt.NDArray[np.int8],
    prev: npt.NDArray[np.int8],
    cur: F64,
    temp: F64,
    flags: npt.NDArray[np.uint8],
) -> list[Finding]:
    out: list[Finding] = []
    before = np.concatenate([prev[None, :], codes[:-1]])
    for k, i in zip(*changes(codes, prev), strict=True):
        new, old = int(codes[k, i]), int(before[k, i])
        details = {
            "from": PHASE_CONDITIONS[old],
            "to": PHASE_CONDITIONS[new],
            "current_a": _r(cur[k, i]),
            "temp_c": _r(temp[k, i]),
            "flags": int(flags[k, i]),
        }
        if new == ISOLATED:
            why = "fault flag" if flags[k, i] & ISOLATING_FLAGS else "current collapsed"
            kind, severity, message = "phase.isolated", "critical", f"phase {i} isolated ({why})"
        elif new == SUSPECT:
            kind, severity = "phase.suspect", "warning"
            message = f"phase {i} reads implausibly without a fault flag"
        elif new == SILENT:
            kind, severity, message = "telemetry.gap", "warning", f"phase {i} stopped reporting"
        else:
            kind, severity = "phase.restored", "info"
            message = f"phase {i} active again (was {PHASE_CONDITIONS[old]})"
        out.append(Finding(int(k), kind, severity, int(i), message, details))
    return out


def _gap_findings(t_s: F64, last_t_s: float | None, gap_s: float) -> list[Finding]:
    previous = np.concatenate([[np.nan if last_t_s is None else last_t_s], t_s[:-1]])
    gaps = t_s - previous
    return [
        Finding(int(k), "telemetry.gap", "warning", None,
                f"no samples for {gaps[k]:.1f} s", {"gap_s": _r(gaps[k])})
        for k in np.nonzero(gaps > gap_s)[0]
    ]  # fmt: skip


def _watch(
    set_mask: npt.NDArray[np.bool_],
    reset_mask: npt.NDArray[np.bool_],
    prev: bool,
    kind: str,
    describe: Callable[[int, bool], tuple[str, dict[str, Any], int | None]],
) -> tuple[npt.NDArray[np.bool_], list[Finding]]:
    """A rail-wide watch with hysteresis over the batch: its state per sample, and a finding
    (warning when raised, info when cleared) at every change."""
    states = latch(set_mask[:, None], reset_mask[:, None], np.array([prev]))[:, 0]
    out = []
    for k in changes(states[:, None], np.array([prev]))[0]:
        on = bool(states[k])
        message, details, phase = describe(int(k), on)
        out.append(
            Finding(int(k), kind, "warning" if on else "info", phase, message,
                    {**details, "cleared": not on})
        )  # fmt: skip
    return states, out
