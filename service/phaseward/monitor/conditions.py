"""Phase condition, sharing and threshold watches over a batch of samples, vectorised.

Codes (stored in the live state as words, in arrays as int8): see ``PHASE_CONDITIONS``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.monitor.rail_model import RailModel
from phaseward.monitor.sequences import changes, debounce, latch
from phaseward.monitor.sharing import SHARE_NOISE_FLOOR, learn
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
    # Sharing (monitor/sharing.py): ``weights`` are the shares capacity uses; these the learned
    # shares and their spread (absent from states stored before sharing could be declared).
    share_learned: list[float] | None = None
    share_var: list[float] | None = None

    @classmethod
    def fresh(cls, model: RailModel) -> Watch:
        n_phases = model.n_phases
        return cls(
            codes=[ACTIVE] * n_phases,
            tail=[],
            weights=model.share_target.tolist(),
            thermal=[False] * n_phases,
            share_learned=model.share_target.tolist(),
            share_var=[SHARE_NOISE_FLOOR**2] * n_phases,
        )

    @classmethod
    def load(cls, data: dict[str, Any], model: RailModel) -> Watch:
        watch = cls(**data)
        if len(watch.codes) != model.n_phases:  # definition changed the phase count
            return cls.fresh(model)
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

    sharing = learn(
        model, codes == ACTIVE, cur, weights=np.asarray(prev.weights),
        learned=np.asarray(prev.share_learned or prev.weights),
        var=np.asarray(prev.share_var or [SHARE_NOISE_FLOOR**2] * model.n_phases),
    )  # fmt: skip
    imbalance_pct, worst = sharing.imbalance_pct, sharing.worst
    imbalance, found = _watch(
        imbalance_pct > rules.imbalance_pct, imbalance_pct < 0.8 * rules.imbalance_pct,
        prev.imbalance, "sharing.imbalance",
        lambda k, on: (
            f"phase {int(worst[k])} deviates {imbalance_pct[k]:.0f} % from its declared share"
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
        weights=[float(w) for w in sharing.weights],
        thermal=[bool(h) for h in hot[-1]],
        imbalance=bool(imbalance[-1]),
        undervoltage=bool(undervoltage[-1]),
        excursion=bool(excursion[-1]),
        last_t_s=float(batch.t_s[-1]),
        share_learned=[float(w) for w in sharing.learned],
        share_var=[float(v) for v in sharing.var],
    )
    findings.sort(key=lambda f: f.sample)
    return Judgement(codes=codes, load_a=load, findings=findings, watch=watch)


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
