"""Phase condition, sharing and threshold watches over a batch of samples, vectorised.

Codes (stored in the live state as words, in arrays as int8): see ``PHASE_CONDITIONS``.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from functools import partial
from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.monitor.rail_model import RailModel
from phaseward.monitor.sequences import changes, debounce, latch
from phaseward.monitor.sharing import SHARE_NOISE_FLOOR, learn
from phaseward.monitor.telemetry import ISOLATING_FLAGS, SampleBatch
from phaseward.physics.plausibility import RULES, GateVerdict, first_code, gate

F64 = npt.NDArray[np.float64]

PHASE_CONDITIONS = ("active", "isolated", "suspect", "silent")
ACTIVE, ISOLATED, SUSPECT, SILENT = range(4)

# Where a phase's reading in use comes from (status ``reading``): reported in this sample,
# the last good one held within the staleness window, or none.
READINGS = ("fresh", "held", "missing")
FRESH, HELD, MISSING = range(3)


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
    # The plausibility gate and partial samples (None: nothing yet). Per phase: the last good
    # current and temperature and their times, the newest in-range temperature the rate rule
    # starts from, and whether an implausible-reading episode is open.
    good_current_a: list[float | None] = field(default_factory=list)
    good_current_t_s: list[float | None] = field(default_factory=list)
    good_temp_c: list[float | None] = field(default_factory=list)
    good_temp_t_s: list[float | None] = field(default_factory=list)
    ref_temp_c: list[float | None] = field(default_factory=list)
    ref_t_s: list[float | None] = field(default_factory=list)
    implausible: list[bool] = field(default_factory=list)
    good_vin_v: float | None = None
    good_vout_v: float | None = None
    vin_implausible: bool = False
    vout_implausible: bool = False
    iout_implausible: bool = False
    ambient_implausible: bool = False
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

    def per_phase(self, name: str, n_phases: int) -> F64:
        """A carried per-phase value as an array, NaN where unknown (or never stored)."""
        values = getattr(self, name)
        if len(values) != n_phases:
            return np.full(n_phases, np.nan)
        return np.array(values, dtype=np.float64)  # None converts to NaN


@dataclass(frozen=True)
class Finding:
    """One event before it is stored."""

    sample: int
    kind: str
    severity: str
    phase: int | None
    message: str
    details: dict[str, Any] = field(default_factory=dict)


# A monitor pass's outcome: the rail's new live state and its findings.
Passed = tuple[dict[str, Any], list[Finding]]


@dataclass(frozen=True)
class Judgement:
    codes: npt.NDArray[np.int8]  # (n, n_phases) debounced phase conditions
    load_a: F64  # (n,) total output current
    weights: F64  # (n, n_phases) sharing weights after each sample
    findings: list[Finding]
    watch: Watch
    # The samples as judged: implausible readings left out, missing or implausible phase
    # readings replaced by the last good one within the staleness window (NaN beyond it),
    # implausible voltages by the last good ones. Temperatures only where fresh and good
    # (a held reading must not correct the estimator twice).
    clean: SampleBatch
    reading: npt.NDArray[np.int8]  # (n, n_phases) READINGS code of the current in use
    reading_t_s: F64  # (n_phases,) time of the current in use at the last sample (NaN: none)
    held_temp_c: F64  # (n, n_phases) temperature in use: fresh, held, or NaN
    assumed_a: F64  # (n, n_phases) current assumed in the load for a phase without one
    rules: GateVerdict


def judge(model: RailModel, batch: SampleBatch, prev: Watch) -> Judgement:
    """Conditions and findings for a batch of in-order samples newer than the live state."""
    rules = model.rules
    n_phases = model.n_phases
    cur, temp = batch.current_a, batch.temp_c
    ambient = np.where(np.isfinite(batch.ambient_c), batch.ambient_c, model.ambient_c)
    flagged = (batch.flags & ISOLATING_FLAGS) != 0

    # The plausibility gate: an implausible reading is judged by nothing, and its phase is
    # suspect at once; a phase without a good reading keeps its last good one for stale_s.
    verdict = gate(
        model.plausible, t_s=batch.t_s, present=batch.present, current_a=cur, temp_c=temp,
        ambient_c=ambient, vin_v=batch.vin_v, vout_v=batch.vout_v, iout_a=batch.iout_a,
        ref_temp_c=prev.per_phase("ref_temp_c", n_phases),
        ref_t_s=prev.per_phase("ref_t_s", n_phases),
    )  # fmt: skip
    bad = batch.present & ((verdict.current != 0) | (verdict.temp != 0))
    # A current converted from a sense voltage at an implausible temperature is no better.
    good_cur = (
        batch.present & (verdict.current == 0) & np.isfinite(cur)
        & ~(batch.sensed & (verdict.temp != 0))
    )  # fmt: skip
    good_temp = (verdict.temp == 0) & np.isfinite(temp)
    held_cur, cur_t = _hold(
        cur, good_cur, batch.t_s, prev.per_phase("good_current_a", n_phases),
        prev.per_phase("good_current_t_s", n_phases),
    )  # fmt: skip
    held_temp, temp_t = _hold(
        temp, good_temp, batch.t_s, prev.per_phase("good_temp_c", n_phases),
        prev.per_phase("good_temp_t_s", n_phases),
    )  # fmt: skip
    with np.errstate(invalid="ignore"):
        cur_within = batch.t_s[:, None] - cur_t <= rules.stale_s
        temp_within = batch.t_s[:, None] - temp_t <= rules.stale_s
    cur_used = np.where(cur_within, held_cur, np.nan)
    temp_used = np.where(temp_within, held_temp, np.nan)
    reading = first_code((good_cur, FRESH), (cur_within, HELD), default=MISSING)

    usable = ~(flagged | bad) & np.isfinite(cur_used)
    others_mean = _mean_of_others(np.where(usable, np.abs(cur_used), np.nan))
    collapsed = (np.abs(cur_used) < rules.collapse_fraction * others_mean) & (
        others_mean > rules.collapse_fraction * model.rated_current_a
    )
    raw = first_code(
        (flagged & batch.present, ISOLATED), (bad, SUSPECT), (~cur_within, SILENT),
        (collapsed, ISOLATED), default=ACTIVE,
    )  # fmt: skip
    width = rules.debounce_samples - 1
    tail = np.full((width, model.n_phases), -1, dtype=np.int8)
    if width and prev.tail:
        known = np.asarray(prev.tail, dtype=np.int8)[-width:]
        tail[width - known.shape[0] :] = known
    prev_codes = np.array(prev.codes, dtype=np.int8)
    codes = debounce(
        raw,
        tail=tail,
        prev=prev_codes,
        length=rules.debounce_samples,
        immediate=(batch.present & (flagged | bad)) | ~cur_within,  # the window was the wait
    )
    iout = np.where(verdict.iout == 0, batch.iout_a, np.nan)
    load, assumed = _load(iout, cur_used, codes)
    cur, temp = cur_used, temp_used  # what the watches below judge by

    findings: list[Finding] = []
    findings += _phase_findings(codes, prev_codes, batch.current_a, batch.temp_c, batch.flags)
    findings += _gap_findings(batch.t_s, prev.last_t_s, rules.gap_s)

    sharing = learn(
        model, codes == ACTIVE, cur, weights=np.asarray(prev.weights),
        learned=np.asarray(prev.share_learned or prev.weights),
        var=np.asarray(prev.share_var or [SHARE_NOISE_FLOOR**2] * model.n_phases),
    )  # fmt: skip
    imbalance_pct, worst = sharing.imbalance_pct, sharing.worst
    volts, _ = _hold(
        np.column_stack([batch.vin_v, batch.vout_v]),
        np.column_stack([verdict.vin == 0, verdict.vout == 0]), batch.t_s,
        np.array([prev.good_vin_v, prev.good_vout_v], dtype=np.float64), np.zeros(2),
    )  # fmt: skip
    vin_v, vout_v = np.where(np.isfinite(volts), volts, [model.vin_v, model.vout_v]).T
    uv_frac = vin_v / model.vin_v
    deviation = np.abs(vout_v / model.vout_v - 1.0)
    # The rail-wide watches (keyed by their Watch fields), latched together; an implausible
    # episode per rail-wide reading.
    rail_wide: dict[str, _RailWatch] = {
        "imbalance": (
            imbalance_pct > rules.imbalance_pct, imbalance_pct < 0.8 * rules.imbalance_pct,
            "sharing.imbalance",
            lambda k, on: (
                f"phase {int(worst[k])} deviates {imbalance_pct[k]:.0f} % from its declared "
                "share" if on else "current sharing back within limits",
                {"deviation_pct": _r(imbalance_pct[k]), "worst_phase": int(worst[k])},
                int(worst[k]) if on else None,
            ),
        ),
        "undervoltage": (
            uv_frac < rules.undervoltage_fraction, uv_frac > rules.undervoltage_fraction + 0.02,
            "input.undervoltage",
            lambda k, on: (
                f"input at {vin_v[k]:.2f} V, nominal {model.vin_v:.2f} V"
                if on else "input voltage recovered",
                {"vin_v": _r(vin_v[k])}, None,
            ),
        ),
        "excursion": (
            deviation > rules.excursion_fraction, deviation < 0.8 * rules.excursion_fraction,
            "output.excursion",
            lambda k, on: (
                f"output at {vout_v[k]:.4f} V, {100 * deviation[k]:.1f} % off nominal"
                if on else "output voltage back within its band",
                {"vout_v": _r(vout_v[k]), "deviation_pct": _r(100 * deviation[k])}, None,
            ),
        ),
    }  # fmt: skip
    for name, rules_hit, values in (
        ("vin_v", verdict.vin, batch.vin_v), ("vout_v", verdict.vout, batch.vout_v),
        ("iout_a", verdict.iout, batch.iout_a), ("ambient_c", verdict.ambient, batch.ambient_c),
    ):  # fmt: skip
        rail_wide[f"{name[:-2]}_implausible"] = (
            rules_hit != 0, rules_hit == 0, "telemetry.implausible",
            partial(_rail_wide_finding, name, values, rules_hit),
        )  # fmt: skip
    watched = _watch(rail_wide, prev)
    findings += watched["imbalance"][1]

    warn_at = model.junction_limit_c - model.warning_margin_k
    was_hot = np.array(prev.thermal, dtype=bool)
    hot = latch((temp > warn_at) & (codes == ACTIVE), temp < warn_at - rules.hysteresis_k, was_hot)
    for k, i in zip(*changes(hot, was_hot), strict=True):
        on = bool(hot[k, i])
        findings.append(
            Finding(
                int(k), "thermal.warning", "warning" if on else "info", int(i),
                f"phase {i} at {temp[k, i]:.1f} degC, warning level {warn_at[i]:.1f} degC"
                if on else f"phase {i} cooled below its warning level",
                {"temp_c": _r(temp[k, i]), "warning_c": _r(warn_at[i]), "cleared": not on},
            )
        )  # fmt: skip
    findings += watched["undervoltage"][1] + watched["excursion"][1]

    was_open = np.asarray(prev.implausible or [False] * n_phases, dtype=bool)
    episodes = latch(bad, (codes != SUSPECT) & ~bad, was_open)
    findings += _implausible_findings(model, episodes, was_open, verdict, batch)
    for name in ("vin_implausible", "vout_implausible", "iout_implausible", "ambient_implausible"):
        findings += watched[name][1]

    history = np.concatenate([tail, raw])[-width:] if width else raw[:0]
    good_vin_v, good_vout_v = _nones(volts[-1])
    watch = Watch(
        codes=codes[-1].tolist(),
        tail=history.tolist(),
        weights=sharing.weights.tolist(),
        thermal=hot[-1].tolist(),
        last_t_s=float(batch.t_s[-1]),
        good_current_a=_nones(held_cur[-1]),
        good_current_t_s=_nones(cur_t[-1]),
        good_temp_c=_nones(held_temp[-1]),
        good_temp_t_s=_nones(temp_t[-1]),
        ref_temp_c=_nones(verdict.ref_temp_c),
        ref_t_s=_nones(verdict.ref_t_s),
        implausible=episodes[-1].tolist(),
        good_vin_v=good_vin_v,
        good_vout_v=good_vout_v,
        **{name: on for name, (on, _) in watched.items()},
        share_learned=sharing.learned.tolist(),
        share_var=sharing.var.tolist(),
    )
    findings.sort(key=lambda f: f.sample)
    clean = replace(
        batch, current_a=cur_used, temp_c=np.where(good_temp & batch.present, temp, np.nan),
        vin_v=vin_v, vout_v=vout_v, iout_a=iout,
        ambient_c=np.where(verdict.ambient == 0, batch.ambient_c, np.nan),  # the rail's then
    )  # fmt: skip
    return Judgement(
        codes=codes, load_a=load, weights=sharing.weights_at, findings=findings, watch=watch,
        clean=clean, reading=reading, reading_t_s=cur_t[-1], held_temp_c=temp_used,
        assumed_a=assumed, rules=verdict,
    )  # fmt: skip


def _nones(values: F64) -> list[float | None]:
    return [v if math.isfinite(v) else None for v in values.tolist()]


def _hold(
    values: F64, good: npt.NDArray[np.bool_], t_s: F64, prev: F64, prev_t: F64
) -> tuple[F64, F64]:
    """The last good value of each column at each row, and its time: a forward fill that
    starts from the previous batch's ``prev`` and ``prev_t`` (NaN: none). (n, m) -> (n, m)."""
    rows = np.where(good, np.arange(values.shape[0])[:, None], -1)
    last = np.maximum.accumulate(rows, axis=0)
    at = np.maximum(last, 0)
    held = np.where(last >= 0, values[at, np.arange(values.shape[1])], prev)
    held_t = np.where(last >= 0, t_s[at], prev_t)
    return held, held_t


def _load(iout_a: F64, cur_used: F64, codes: npt.NDArray[np.int8]) -> tuple[F64, F64]:
    """The rail's load per sample and the current assumed for each phase without a reading.

    The rail's own output current when reported; else the phases' currents in use, and a
    phase that is not isolated yet has no current in use is assumed to carry the mean of the
    phases that have one (never nothing: an unread phase must not shrink the load)."""
    counted = np.isfinite(cur_used) & (codes != ISOLATED)
    unknown = ~np.isfinite(cur_used) & (codes != ISOLATED)
    total = np.where(counted, np.maximum(cur_used, 0.0), 0.0).sum(axis=1)
    mean = total / np.maximum(counted.sum(axis=1), 1)
    measured = np.isfinite(iout_a)
    assumed = np.where(unknown & ~measured[:, None], mean[:, None], np.nan)
    load = np.where(measured, iout_a, np.nansum(cur_used, axis=1) + np.nansum(assumed, axis=1))
    return load, assumed


def _rail_wide_finding(
    name: str, values: F64, rules_hit: npt.NDArray[np.int8], k: int, on: bool
) -> tuple[str, dict[str, Any], int | None]:
    value, rule = float(values[k]), int(rules_hit[k])
    if not on:
        return f"{name} reads plausibly again", {"reading": name}, None
    instead = "the rail's definition" if name == "ambient_c" else "the last good value"
    if name == "iout_a":
        instead = "the phases' sum"
    return (
        f"implausible reading {name} = {value:g} ({RULES[rule].replace('_', ' ')}); "
        f"{instead} stands in",
        {"reading": name, "value": _r(value), "rule": RULES[rule]},
        None,
    )


def _implausible_findings(
    model: RailModel,
    episodes: npt.NDArray[np.bool_],
    prev: npt.NDArray[np.bool_],
    verdict: GateVerdict,
    batch: SampleBatch,
) -> list[Finding]:
    """One ``telemetry.implausible`` per phase per episode: opened by the first implausible
    reading (naming it and its rule), cleared when the phase is no longer suspect."""
    out: list[Finding] = []
    limits = model.plausible
    for k, i in zip(*changes(episodes, prev), strict=True):
        if not episodes[k, i]:
            out.append(
                Finding(int(k), "telemetry.implausible", "info", int(i),
                        f"phase {i} reads plausibly again", {"cleared": True})
            )  # fmt: skip
            continue
        on_current = verdict.current[k, i] != 0
        name = "current_a" if on_current else "temp_c"
        value = float(batch.current_a[k, i] if on_current else batch.temp_c[k, i])
        rule = RULES[int(verdict.current[k, i] if on_current else verdict.temp[k, i])]
        limit = {
            "current_above_limit": limits.current_max_a[i],
            "current_reverse": limits.current_min_a[i],
            "temp_out_of_range": limits.temp_max_c[i]
            if value > limits.temp_max_c[i]
            else limits.temp_min_c[i],
            "temp_rate": limits.temp_rate_k_per_s[i],
        }.get(rule, np.nan)
        out.append(
            Finding(
                int(k), "telemetry.implausible", "warning", int(i),
                f"phase {i}: implausible reading {name} = {value:g} "
                f"({rule.replace('_', ' ')}); left out of every judgement",
                {"reading": name, "value": _r(value), "rule": rule, "limit": _r(limit),
                 "cleared": False},
            )
        )  # fmt: skip
    return out


def _r(x: Any) -> float | None:
    value = float(x)
    return round(value, 6) if math.isfinite(value) else None


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


# A rail-wide watch: when it is raised and cleared (n,), its event kind, and what a change at
# sample k (raised or not) says: message, details, phase.
Describe = Callable[[int, bool], tuple[str, dict[str, Any], int | None]]
_RailWatch = tuple[npt.NDArray[np.bool_], npt.NDArray[np.bool_], str, Describe]


def _watch(watches: dict[str, _RailWatch], prev: Watch) -> dict[str, tuple[bool, list[Finding]]]:
    """Rail-wide watches with hysteresis over the batch, latched together from their states
    in ``prev`` (the Watch fields they are named by): per watch, its state after the batch
    and a finding (warning when raised, info when cleared) at every change."""
    before = np.array([getattr(prev, name) for name in watches], dtype=bool)
    cases = list(watches.values())
    states = latch(
        np.column_stack([c[0] for c in cases]), np.column_stack([c[1] for c in cases]), before
    )
    found: list[list[Finding]] = [[] for _ in watches]
    rows, cols = changes(states, before)
    for k, j in zip(rows.tolist(), cols.tolist(), strict=True):
        on = bool(states[k, j])
        _, _, kind, describe = cases[j]
        message, details, phase = describe(k, on)
        found[j].append(
            Finding(k, kind, "warning" if on else "info", phase, message,
                    {**details, "cleared": not on})
        )  # fmt: skip
    return {name: (on, f) for name, on, f in zip(watches, states[-1].tolist(), found, strict=True)}
