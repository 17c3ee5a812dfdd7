"""Fault class of a phase from the samples around its isolation.

When a phase is cut off (breaker open, ORing diode blocking), the samples around the event
carry the mark of what went wrong (the mechanisms are the textbook synchronous-buck failure
modes; the signatures are common practice in power-stage failure analysis):

* ``high_side_short``: the high-side switch conducts permanently. The switch node sits at
  Vin and the low-side switch shoots through it: the input current surges, the input voltage
  sags, and the phase's inductor, driven by Vin, briefly lifts the output (overshoot).
* ``low_side_short``: the low-side switch conducts permanently. The high-side switch shoots
  through it (input sag) and the phase's inductor, tied to ground, pulls the output well below
  nominal (dip).
* ``open_phase``: the phase simply stops conducting: its current collapses and the other
  phases take over its share, with no input sag and no output excursion.
* ``undetermined``: too few samples, too quiet a phase, a gap in the samples around the event,
  or features that do not clear one class's rules (marginal or conflicting).

Windows, over sample indices with e = ``event_index`` (the sample at which the isolation was
seen): baseline = [0, e - _LEAD_SAMPLES), around = [e - _LEAD_SAMPLES, e + _TRAIL_SAMPLES],
after = (e + _TRAIL_SAMPLES, n). The fault itself precedes its detection, so the around
window reaches back _LEAD_SAMPLES. Baseline levels are medians (robust to a stray sample).

Features (the ``evidence`` of a :class:`Signature`), each computed over whole windows:

* vin_sag_pct = 100 (median vin before - min vin around) / vin_nominal_v
* vout_overshoot_pct = 100 (max vout around - median vout before) / vout_nominal_v
* vout_dip_pct = 100 (median vout before - min vout around) / vout_nominal_v
* phase_spike_ratio = max phase current around / median phase current before
* input_surge_ratio = max iin around / median iin before when ``iin_a`` is given (and its
  baseline is positive), else the phase spike ratio (``surge_from_input_current`` 1 or 0)
* phase_remaining_ratio = |median phase current after| / median phase current before
* others_pickup_ratio = (median others after - median others before) / median phase before
* phase_share = median phase before / (median phase before + median others before)
* window_gap_ratio = largest sample interval from the last baseline sample to the first
  after sample / median baseline interval

Scoring: each class is a short list of rules (feature, threshold, full). A rule's margin is
(value - threshold) / (full - threshold): 0 at the threshold, 1 where the feature is clear
evidence, negative on the wrong side (``full`` above the threshold means "must exceed", below
means "must stay under"). A class's score is its smallest margin; the classes exclude each
other through their rules, so at most one scores above 0. Its confidence is min(1, score),
and a score under _MIN_CONFIDENCE counts as marginal, which gives ``undetermined``.
"""

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
SignatureKind = Literal["high_side_short", "low_side_short", "open_phase", "undetermined"]

# Windows, in samples (telemetry arrives at whatever rate the rack posts; a breaker acts
# within microseconds to milliseconds, faster than any telemetry rate, so the fault shows in
# the last samples before the isolation is seen and settles within a couple after).
_LEAD_SAMPLES = 2  # samples before the event that belong to the fault, not the baseline
_TRAIL_SAMPLES = 2  # samples after the event still inside the transient
_MIN_BASELINE_SAMPLES = 3  # fewest baseline samples for a median level
_MIN_AFTER_SAMPLES = 2  # fewest settled samples to judge collapse and pickup
SAMPLES_BEFORE = _LEAD_SAMPLES + _MIN_BASELINE_SAMPLES  # fewest samples needed before the event
SAMPLES_AFTER = _TRAIL_SAMPLES + _MIN_AFTER_SAMPLES  # fewest samples needed after the event

# Data-sufficiency gates.
_MIN_PHASE_SHARE = 0.02  # a phase carrying < 2 % of the rail current is too quiet to judge
#   (common practice: current-sense accuracy is about 1 % of full scale)
_MAX_GAP_RATIO = 4.0  # sample interval around the event at most 4x the baseline interval

# Thresholds (common practice for regulated rails; values from memory):
_VIN_SAG_PCT = 3.0  # %, beyond the normal load-step droop of a stiff input bus
_VIN_SAG_CLEAR_PCT = 10.0  # %, an unmistakable shoot-through sag
_VIN_QUIET_PCT = 1.0  # %, an undisturbed input
_VOUT_OVERSHOOT_PCT = 3.0  # %, outside the usual +-3 % static tolerance of a core rail
_VOUT_OVERSHOOT_CLEAR_PCT = 8.0  # %
_VOUT_QUIET_PCT = 1.0  # %, well inside the tolerance band
_VOUT_DIP_PCT = 5.0  # %, "well below nominal": beyond a load-step undershoot
_VOUT_DIP_CLEAR_PCT = 15.0  # %
_VOUT_DIP_QUIET_PCT = 2.0  # %, the small undershoot of a phase dropping out
_SURGE_RATIO = 1.5  # peak over baseline current that counts as a surge / spike
_SURGE_CLEAR_RATIO = 3.0
_SPIKE_QUIET_RATIO = 1.2  # no more than a 20 % bump before an open phase collapses
_REMAINING_RATIO = 0.2  # a phase that keeps < 20 % of its current has stopped conducting
_REMAINING_CLEAR_RATIO = 0.05
_PICKUP_RATIO = 0.5  # the other phases took at least half of the lost current ...
_PICKUP_CLEAR_RATIO = 0.9  # ... (all of it when the load held)

_MIN_CONFIDENCE = 0.25  # smallest score that is not marginal

_COLLAPSED = ("phase_remaining_ratio", _REMAINING_RATIO, _REMAINING_CLEAR_RATIO)
_RULES: dict[SignatureKind, tuple[tuple[str, float, float], ...]] = {
    "high_side_short": (
        ("vin_sag_pct", _VIN_SAG_PCT, _VIN_SAG_CLEAR_PCT),
        ("input_surge_ratio", _SURGE_RATIO, _SURGE_CLEAR_RATIO),
        ("vout_overshoot_pct", _VOUT_OVERSHOOT_PCT, _VOUT_OVERSHOOT_CLEAR_PCT),
        ("vout_dip_pct", _VOUT_DIP_PCT, _VOUT_DIP_QUIET_PCT),
        _COLLAPSED,
    ),
    "low_side_short": (
        ("vin_sag_pct", _VIN_SAG_PCT, _VIN_SAG_CLEAR_PCT),
        ("vout_dip_pct", _VOUT_DIP_PCT, _VOUT_DIP_CLEAR_PCT),
        ("vout_overshoot_pct", _VOUT_OVERSHOOT_PCT, _VOUT_QUIET_PCT),
        _COLLAPSED,
    ),
    "open_phase": (
        ("vin_sag_pct", _VIN_SAG_PCT, _VIN_QUIET_PCT),
        ("vout_overshoot_pct", _VOUT_OVERSHOOT_PCT, _VOUT_QUIET_PCT),
        ("vout_dip_pct", _VOUT_DIP_PCT, _VOUT_DIP_QUIET_PCT),
        ("phase_spike_ratio", _SURGE_RATIO, _SPIKE_QUIET_RATIO),
        _COLLAPSED,
        ("others_pickup_ratio", _PICKUP_RATIO, _PICKUP_CLEAR_RATIO),
    ),
}


@dataclass(frozen=True, eq=False)
class Signature:
    """Classification of one isolation.

    kind: the fault class; confidence: 0..1 (0 for ``undetermined``); evidence: the measured
    features by name (module docstring) plus sample counts; scores: each class's smallest
    rule margin (empty when the data-sufficiency gates failed); reason: one line for people.
    """

    kind: SignatureKind
    confidence: float
    evidence: dict[str, float] = field(default_factory=dict)
    scores: dict[str, float] = field(default_factory=dict)
    reason: str = ""


def _trace(name: str, value: npt.ArrayLike, n: int) -> FloatArray:
    arr = np.asarray(value, dtype=np.float64)
    if arr.shape != (n,):
        raise ValueError(f"{name} must have shape (n,) = ({n},), the shape of t_s")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite")
    return arr


def _score(features: dict[str, float]) -> dict[str, float]:
    """Smallest rule margin per class (module docstring), from one vectorised evaluation."""
    kinds = list(_RULES)
    rules = [rule for kind in kinds for rule in _RULES[kind]]
    value = np.array([features[name] for name, _, _ in rules])
    threshold = np.array([rule[1] for rule in rules])
    full = np.array([rule[2] for rule in rules])
    margin = (value - threshold) / (full - threshold)
    starts = np.cumsum([0] + [len(_RULES[kind]) for kind in kinds[:-1]])
    return dict(zip(kinds, np.minimum.reduceat(margin, starts).tolist(), strict=True))


def classify_isolation(
    t_s: npt.ArrayLike,
    vin_v: npt.ArrayLike,
    vout_v: npt.ArrayLike,
    phase_current_a: npt.ArrayLike,
    others_current_a: npt.ArrayLike,
    event_index: int,
    *,
    vin_nominal_v: float,
    vout_nominal_v: float,
    iin_a: npt.ArrayLike | None = None,
) -> Signature:
    """Classify the isolation of a phase at sample ``event_index`` (see the module docstring).

    t_s: (n,) strictly increasing sample times, s; vin_v, vout_v: (n,) input and output
    voltage, V; phase_current_a: (n,) the isolated phase's current, A; others_current_a: (n,)
    the summed current of the other phases, A; iin_a: optional (n,) input current, A;
    vin_nominal_v, vout_nominal_v > 0, V. ValueError naming the argument for bad input.

    >>> t = np.arange(12) * 1e-3
    >>> vin, vout = np.full(12, 12.0), np.full(12, 1.0)
    >>> phase = np.array([20.0] * 5 + [21.0, 8.0] + [0.0] * 5)
    >>> others = np.array([60.0] * 6 + [70.0] + [80.0] * 5)
    >>> sig = classify_isolation(t, vin, vout, phase, others, 6,
    ...                          vin_nominal_v=12.0, vout_nominal_v=1.0)
    >>> sig.kind, round(sig.confidence, 2), round(sig.evidence["others_pickup_ratio"], 2)
    ('open_phase', 1.0, 1.0)
    >>> classify_isolation(t[:1], vin[:1], vout[:1], phase[:1], others[:1], 0,
    ...                    vin_nominal_v=12.0, vout_nominal_v=1.0).kind
    'undetermined'
    """
    t = np.asarray(t_s, dtype=np.float64)
    if t.ndim != 1 or t.size == 0 or not np.all(np.isfinite(t)):
        raise ValueError("t_s must be a finite array of shape (n,) with n >= 1")
    if np.any(np.diff(t) <= 0.0):
        raise ValueError("t_s must be strictly increasing")
    n = t.size
    vin = _trace("vin_v", vin_v, n)
    vout = _trace("vout_v", vout_v, n)
    phase = _trace("phase_current_a", phase_current_a, n)
    others = _trace("others_current_a", others_current_a, n)
    iin = None if iin_a is None else _trace("iin_a", iin_a, n)
    if isinstance(event_index, bool) or not isinstance(event_index, int | np.integer):
        raise ValueError("event_index must be an int")
    if not 0 <= event_index < n:
        raise ValueError(f"event_index must be a sample index in 0..{n - 1}")
    for name, nominal in (("vin_nominal_v", vin_nominal_v), ("vout_nominal_v", vout_nominal_v)):
        if not (np.isfinite(nominal) and nominal > 0.0):
            raise ValueError(f"{name} must be finite and > 0")

    lo, hi = event_index - _LEAD_SAMPLES, event_index + _TRAIL_SAMPLES + 1
    evidence = {"samples_before": float(max(lo, 0)), "samples_after": float(max(n - hi, 0))}
    if lo < _MIN_BASELINE_SAMPLES or n - hi < _MIN_AFTER_SAMPLES:
        return Signature(
            "undetermined",
            0.0,
            evidence,
            reason=(
                f"needs {_MIN_BASELINE_SAMPLES} baseline samples and {_MIN_AFTER_SAMPLES} "
                f"settled samples outside the {_LEAD_SAMPLES + _TRAIL_SAMPLES + 1}-sample "
                "event window"
            ),
        )
    base = slice(0, lo)
    around = slice(lo, hi)
    after = slice(hi, n)
    vin_base, vout_base = np.median(vin[base]), np.median(vout[base])
    phase_base, others_base = np.median(phase[base]), np.median(others[base])
    intervals = np.diff(t)
    evidence["window_gap_ratio"] = float(
        intervals[lo - 1 : hi].max() / np.median(intervals[: lo - 1])
    )
    total = phase_base + others_base
    evidence["phase_share"] = float(phase_base / total) if total > 0.0 else 0.0
    if evidence["phase_share"] < _MIN_PHASE_SHARE:  # also a phase at or below 0 A
        return Signature(
            "undetermined",
            0.0,
            evidence,
            reason=f"the phase carried under {_MIN_PHASE_SHARE:.0%} of the rail current before",
        )
    if evidence["window_gap_ratio"] > _MAX_GAP_RATIO:
        return Signature(
            "undetermined", 0.0, evidence, reason="a gap in the samples around the event"
        )

    spike = float(phase[around].max() / phase_base)
    surge, from_input = spike, False
    if iin is not None and np.median(iin[base]) > 0.0:
        surge, from_input = float(iin[around].max() / np.median(iin[base])), True
    evidence |= {
        "vin_sag_pct": float(100.0 * (vin_base - vin[around].min()) / vin_nominal_v),
        "vout_overshoot_pct": float(100.0 * (vout[around].max() - vout_base) / vout_nominal_v),
        "vout_dip_pct": float(100.0 * (vout_base - vout[around].min()) / vout_nominal_v),
        "phase_spike_ratio": spike,
        "input_surge_ratio": surge,
        "surge_from_input_current": float(from_input),
        "phase_remaining_ratio": float(abs(np.median(phase[after])) / phase_base),
        "others_pickup_ratio": float((np.median(others[after]) - others_base) / phase_base),
    }
    scores = _score(evidence)
    best: SignatureKind = max(_RULES, key=scores.__getitem__)
    if scores[best] <= 0.0:
        return Signature(
            "undetermined",
            0.0,
            evidence,
            scores,
            "no class fits: the features are absent or conflict",
        )
    if scores[best] < _MIN_CONFIDENCE:
        return Signature(
            "undetermined",
            0.0,
            evidence,
            scores,
            f"marginal: {best} clears its thresholds by only {scores[best]:.2f}",
        )
    return Signature(best, min(1.0, scores[best]), evidence, scores, f"{best}: every rule cleared")
