"""Fault class of an isolated phase, from a capture recorded around the trip.

A protection trip ends a fault that lasts microseconds to milliseconds; telemetry at one sample
per second sees only the aftermath (the phase reads 0 A), which every fault class shares. So the
class is judged from a *capture*: the waveforms a rack records around the trip at MHz-class
rates. With samples alone the answer is ``undetermined`` and says why (:func:`too_slow`).

Classes (the textbook synchronous-buck failure modes; the signatures are common practice in
power-stage failure analysis):

* ``high_side_short``: the high-side switch conducts for good. The low side shoots through it on
  each turn-on (the input current surges, the input voltage dips) and the switch node, held
  high, drives the phase current up far above its share until the breaker opens.
* ``low_side_short``: the low-side switch conducts for good. The high side shoots through it (surge
  and dip) and the switch node, held at ground, drives the phase current down and negative
  (reversal) until the output ORing diode opens.
* ``open_phase``: the phase's current path opens: its current falls to zero within a sample or
  two, with no surge at the input.
* ``gate_drive_loss``: both switches stay off: the current freewheels through the low-side body
  diode and ramps to zero at (Vout + Vdiode) / L, with no surge; the gate (or the switch node)
  stops switching.
* ``no_fault``: the phase keeps its current and the input is undisturbed (a nuisance trip, or a
  load step).

Capture layout: times ``t_s`` in seconds from the trigger (the trip at t = 0, negative before),
strictly increasing at a near-constant rate. The first half of the pre-trigger record is the
*baseline*; everything after it is the *event window*; the last quarter of the post-trigger
record is the *settled* window.

Features (the ``evidence``; ``scale`` = the larger of the phase's baseline current and half the
textbook ripple (Vin - Vout) D / (L fsw), Erickson & Maksimovic; "period-averaged" = a moving
mean over one switching period, which removes the ripple but keeps anything slower):

* input_surge_ratio = max period-averaged iin in the event window / mean baseline iin (NaN
  without an input current channel)
* vin_dip_pct = 100 (lowest period-averaged vin in the baseline - lowest in the window) /
  vin_nominal: the dip beyond what noise and ripple already reach; vin_dip_duration_s = time
  the period-averaged vin spends below half that depth
* vout_overshoot_pct, vout_dip_pct: the same for the output against vout_nominal
* phase_rise_ratio = how far the phase current peaks above the baseline's own peaks (both on a
  short moving mean over a fifth of a period, which keeps a rise within a period but little
  noise), / scale
* phase_reversal_ratio = negative current in the window beyond the baseline's own (the same
  short mean), / scale
* phase_remaining_ratio = |mean phase current in the settled window| / scale
* phase_drop_ratio = largest fall of the phase current within three samples (3-sample means)
  in the event window / scale: near 1 for a path that opens, small for a diode ramp
* drive_activity = share of switching periods in the settled window in which the phase's gate
  (or else switch-node) signal still swings over half its baseline swing (NaN without one)

Scoring: each class is a list of rules "feature high" or "feature low" against the feature's
limits (quiet, edge, clear). A "high" rule's margin is (value - edge) / (clear - edge), a "low"
rule's (edge - value) / (edge - quiet): 0 at the edge, 1 where the evidence is clear, negative on
the wrong side. A rule whose feature is missing (NaN) is left out and the evidence says so. A
class's score is its smallest margin; the best class wins if its score reaches
``min_confidence``, else the answer is ``undetermined`` (marginal or conflicting evidence).
"""

from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Final, Literal

import numpy as np
import numpy.typing as npt

from phaseward.physics.ripple import inductor_ripple_pp_a

FloatArray = npt.NDArray[np.float64]
SignatureKind = Literal[
    "high_side_short", "low_side_short", "open_phase", "gate_drive_loss", "no_fault",
    "undetermined",
]  # fmt: skip
FAULT_CLASSES: Final = (
    "high_side_short", "low_side_short", "open_phase", "gate_drive_loss", "no_fault",
)  # fmt: skip

# Limits per feature: (quiet, edge, clear). "Low" rules use quiet..edge, "high" rules
# edge..clear. Basis of each default, beside it; the simulated population in tests/buck_sim.py
# (invented) shows them separating the classes at up to 5 % noise (bench/RESULTS.md).
DEFAULT_LIMITS: Final[Mapping[str, tuple[float, float, float]]] = MappingProxyType(
    {
        # Shoot-through through a few tens of milliohms draws many times the load current;
        # load steps move the input current by tens of percent (common practice).
        "input_surge_ratio": (1.5, 2.0, 4.0),
        # A stiff input bus holds within a fraction of a percent through load steps;
        # shoot-through discharging the input capacitors dips it by percents (common practice).
        "vin_dip_pct": (0.3, 0.6, 2.5),
        # A phase in current-mode control stays within its ripple of its share; a switch node
        # stuck high drives it up by its whole share within microseconds (from memory).
        "phase_rise_ratio": (0.2, 0.5, 1.5),
        # Reverse current beyond a tenth of the share is what ORing controllers act on
        # (common practice).
        "phase_reversal_ratio": (0.05, 0.12, 0.3),
        # Collapsed: under 30 % of its share left after the trip; kept: above (common practice,
        # as the monitor's collapse fraction).
        "phase_remaining_ratio": (0.1, 0.3, 0.6),
        # An opened path drops the current within a couple of samples; a diode ramp at
        # (Vout + Vd) / L takes microseconds (from the physics at >= 20 samples per period).
        "phase_drop_ratio": (0.2, 0.4, 0.7),
        # Driven: the gate or node keeps switching in most periods (common practice).
        "drive_activity": (0.1, 0.5, 0.9),
    }
)
FEATURES: Final = tuple(DEFAULT_LIMITS)

_HIGH, _LOW = 1, -1
# Shoot-through shows best in the input current; without that channel, in the input voltage.
_SHOOT = ("input_surge_ratio", "vin_dip_pct")
_RULES: Final[Mapping[str, tuple[tuple[tuple[str, ...], int], ...]]] = MappingProxyType(
    {
        "high_side_short": (
            (_SHOOT, _HIGH), (("phase_rise_ratio",), _HIGH), (("phase_reversal_ratio",), _LOW),
            (("phase_remaining_ratio",), _LOW),
        ),
        "low_side_short": (
            (_SHOOT, _HIGH), (("phase_reversal_ratio",), _HIGH), (("phase_rise_ratio",), _LOW),
            (("phase_remaining_ratio",), _LOW),
        ),
        "open_phase": (
            (_SHOOT, _LOW), (("phase_rise_ratio",), _LOW), (("phase_reversal_ratio",), _LOW),
            (("phase_remaining_ratio",), _LOW), (("phase_drop_ratio",), _HIGH),
            (("drive_activity",), _HIGH),
        ),
        "gate_drive_loss": (
            (_SHOOT, _LOW), (("phase_rise_ratio",), _LOW), (("phase_reversal_ratio",), _LOW),
            (("phase_remaining_ratio",), _LOW), (("phase_drop_ratio",), _LOW),
            (("drive_activity",), _LOW),
        ),
        "no_fault": (
            (_SHOOT, _LOW), (("phase_rise_ratio",), _LOW), (("phase_reversal_ratio",), _LOW),
            (("phase_remaining_ratio",), _HIGH),
        ),
    }
)  # fmt: skip


@dataclass(frozen=True)
class EvidenceRules:
    """The thresholds a rail's captures are judged by (defaults: module constants).

    limits: (quiet, edge, clear) per feature, quiet < edge < clear; min_samples_per_period: a
    capture slower than this many samples per switching period cannot show the fault's shape
    (common practice: ten points per period to see a ripple triangle); min_baseline_periods:
    switching periods of baseline before the event window; min_phase_share: a phase carrying
    less of the rail's current is too quiet to judge (current-sense accuracy is about 1 % of
    full scale, common practice); min_confidence: the smallest score that is not marginal.
    """

    limits: Mapping[str, tuple[float, float, float]] = field(default_factory=lambda: DEFAULT_LIMITS)
    min_samples_per_period: float = 10.0
    min_baseline_periods: float = 10.0
    min_phase_share: float = 0.02
    min_confidence: float = 0.25

    def __post_init__(self) -> None:
        for name, (quiet, edge, clear) in self.limits.items():
            if name not in DEFAULT_LIMITS:
                raise ValueError(f"unknown feature '{name}'; known: {', '.join(FEATURES)}")
            if not (np.isfinite([quiet, edge, clear]).all() and quiet < edge < clear):
                raise ValueError(f"limits of {name} must be finite with quiet < edge < clear")
        if set(self.limits) != set(DEFAULT_LIMITS):
            object.__setattr__(self, "limits", MappingProxyType({**DEFAULT_LIMITS, **self.limits}))


@dataclass(frozen=True, eq=False)
class Signature:
    """Classification of one isolation.

    kind: the fault class; confidence: 0..1 (0 for ``undetermined``); evidence: the measured
    features by name (module docstring); used: the features the winning class's rules were
    judged on; scores: each class's smallest rule margin; reason: one line for people.
    """

    kind: SignatureKind
    confidence: float
    evidence: dict[str, float] = field(default_factory=dict)
    used: tuple[str, ...] = ()
    scores: dict[str, float] = field(default_factory=dict)
    reason: str = ""


def too_slow(sample_interval_s: float) -> Signature:
    """The honest answer from telemetry samples alone: the fault is over before the next sample.

    >>> too_slow(1.0).reason
    'one sample per 1 s is slower than the event; attach a capture'
    """
    return Signature(
        "undetermined",
        0.0,
        {"sample_interval_s": float(sample_interval_s)},
        reason=f"one sample per {sample_interval_s:.3g} s is slower than the event; "
        "attach a capture",
    )


def _moving_mean(x: FloatArray, width: int) -> FloatArray:
    """Trailing mean over ``width`` samples (the first width - 1 repeat the first full mean);
    axis 0, any trailing shape."""
    c = np.cumsum(np.concatenate([np.zeros((1, *x.shape[1:])), x]), axis=0)
    full = (c[width:] - c[:-width]) / width
    return np.concatenate([np.repeat(full[:1], width - 1, axis=0), full])


def _channel(name: str, value: npt.ArrayLike | None, shape: tuple[int, ...]) -> FloatArray | None:
    if value is None:
        return None
    arr = np.asarray(value, dtype=np.float64)
    if arr.shape != shape:
        raise ValueError(f"{name} must have shape {shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite")
    return arr


def _required(name: str, value: npt.ArrayLike, n: int) -> FloatArray:
    arr = _channel(name, value, (n,))
    if arr is None:
        raise ValueError(f"{name} is required")
    return arr


def _undetermined(reason: str, evidence: dict[str, float]) -> Signature:
    return Signature("undetermined", 0.0, evidence, reason=reason)


def classify_capture(
    t_s: npt.ArrayLike,
    current_a: npt.ArrayLike,
    vin_v: npt.ArrayLike,
    vout_v: npt.ArrayLike,
    *,
    phase: int,
    vin_nominal_v: float,
    vout_nominal_v: float,
    fsw_hz: float,
    inductance_h: float,
    iin_a: npt.ArrayLike | None = None,
    drive_v: npt.ArrayLike | None = None,
    rules: EvidenceRules = EvidenceRules(),
) -> Signature:
    """Classify the isolation of ``phase`` from a capture (see the module docstring).

    t_s: (n,) seconds from the trigger, strictly increasing; current_a: (n, n_phases) phase
    currents, A; vin_v, vout_v: (n,), V; iin_a: optional (n,) input current, A; drive_v:
    optional (n,) the phase's gate or switch-node voltage, V; nominal voltages, the switching
    frequency and the phase inductance from the rail definition. ValueError naming the argument
    for bad input.

    >>> t = np.arange(-1000, 400) * 50e-9  # 20 MSa/s, 500 kHz: 40 samples a period
    >>> i = np.where(t < -1e-6, 20.0, 0.0)[:, None] * np.ones((1, 4))
    >>> i[:, 1:] = np.where(t < -1e-6, 20.0, 26.7)[:, None]
    >>> sig = classify_capture(t, i, np.full(1400, 12.0), np.full(1400, 1.0), phase=0,
    ...                        vin_nominal_v=12.0, vout_nominal_v=1.0, fsw_hz=500e3,
    ...                        inductance_h=220e-9, iin_a=np.full(1400, 6.7))
    >>> sig.kind, round(sig.confidence, 2), sig.used[-1]
    ('open_phase', 1.0, 'phase_drop_ratio')
    """
    t = np.asarray(t_s, dtype=np.float64)
    if t.ndim != 1 or t.size < 4 or not np.all(np.isfinite(t)):
        raise ValueError("t_s must be a finite array of shape (n,) with n >= 4")
    steps = np.diff(t)
    if np.any(steps <= 0.0):
        raise ValueError("t_s must be strictly increasing")
    n = t.size
    current = np.asarray(current_a, dtype=np.float64)
    if current.ndim != 2 or current.shape[0] != n or not np.all(np.isfinite(current)):
        raise ValueError(f"current_a must be finite with shape ({n}, n_phases)")
    if isinstance(phase, bool) or not 0 <= phase < current.shape[1]:
        raise ValueError(f"phase must be a phase index in 0..{current.shape[1] - 1}")
    vin = _required("vin_v", vin_v, n)
    vout = _required("vout_v", vout_v, n)
    iin = _channel("iin_a", iin_a, (n,))
    drive = _channel("drive_v", drive_v, (n,))
    for name, value in (("vin_nominal_v", vin_nominal_v), ("vout_nominal_v", vout_nominal_v),
                        ("fsw_hz", fsw_hz), ("inductance_h", inductance_h)):  # fmt: skip
        if not (np.isfinite(value) and value > 0.0):
            raise ValueError(f"{name} must be finite and > 0")

    dt = float(np.median(steps))
    per_period = 1.0 / (dt * fsw_hz)
    evidence = {"sample_rate_hz": 1.0 / dt, "samples_per_period": per_period}
    if per_period < rules.min_samples_per_period:
        return _undetermined(
            f"the capture has {per_period:.3g} samples per switching period, fewer than "
            f"{rules.min_samples_per_period:g}: too slow to show the fault's shape",
            evidence,
        )
    base = t < t[0] / 2.0
    event = ~base
    settled = t >= 0.75 * t[-1]
    baseline_periods = float(base.sum()) / per_period
    evidence["baseline_periods"] = baseline_periods
    if t[0] >= 0.0 or t[-1] <= 0.0 or baseline_periods < rules.min_baseline_periods:
        return _undetermined(
            "the capture needs times from the trigger (t = 0), with at least "
            f"{2 * rules.min_baseline_periods:g} switching periods before it and some after",
            evidence,
        )
    width = max(1, round(per_period))
    own = current[:, phase]
    i0 = float(own[base].mean())
    total0 = float(current[base].sum(axis=1).mean())
    evidence["baseline_current_a"] = i0
    evidence["phase_share"] = i0 / total0 if total0 > 0.0 else 0.0
    if evidence["phase_share"] < rules.min_phase_share:
        return _undetermined(
            f"the phase carried under {rules.min_phase_share:.0%} of the rail current before "
            "the trip: too quiet to judge",
            evidence,
        )
    ripple = float(inductor_ripple_pp_a(vin_nominal_v, vout_nominal_v, inductance_h, fsw_hz))
    scale = max(i0, ripple / 2.0)

    short = _moving_mean(own, max(1, round(per_period / 5)))
    three = _moving_mean(own, 3)
    vin_avg = _moving_mean(vin, width)
    vout_avg = _moving_mean(vout, width)
    vout0 = float(vout[base].mean())
    floor = float(vin_avg[base].min())  # the baseline's own lowest (noise, ripple)
    dip_v = floor - float(vin_avg[event].min())
    evidence |= {
        "vin_dip_pct": 100.0 * dip_v / vin_nominal_v,
        "vin_dip_duration_s": dt * float(np.sum(vin_avg[event] < floor - dip_v / 2.0))
        if dip_v > 0.0
        else 0.0,
        "vout_overshoot_pct": 100.0 * (float(vout_avg[event].max()) - vout0) / vout_nominal_v,
        "vout_dip_pct": 100.0 * (vout0 - float(vout_avg[event].min())) / vout_nominal_v,
        "phase_rise_ratio": (float(short[event].max()) - float(short[base].max())) / scale,
        "phase_reversal_ratio": max(
            0.0, min(0.0, float(short[base].min())) - float(short[event].min())
        ) / scale,
        "phase_remaining_ratio": abs(float(own[settled].mean())) / scale,
        "phase_drop_ratio": float(np.max(three[:-3][event[3:]] - three[3:][event[3:]])) / scale,
        "input_surge_ratio": np.nan,
        "drive_activity": np.nan,
    }  # fmt: skip
    if iin is not None and iin[base].mean() > 0.0:
        evidence["input_surge_ratio"] = float(
            _moving_mean(iin, width)[event].max() / iin[base].mean()
        )
    if drive is not None:
        evidence["drive_activity"] = _activity(drive, base, settled, width)
    before = current[base].mean(axis=0)  # phases too quiet to judge never count as collapsed
    judged = before > rules.min_phase_share * total0
    remaining = np.where(judged, np.abs(current[settled].mean(axis=0)), np.inf) / np.where(
        judged, before, 1.0
    )
    collapsed = int(np.argmin(remaining))
    evidence["collapsed_phase"] = float(collapsed)
    signature = _decide(evidence, rules)
    if collapsed != phase and remaining[collapsed] < rules.limits["phase_remaining_ratio"][1]:
        note = f"; phase {collapsed}, not {phase}, collapses most in the capture"
        return replace(signature, reason=signature.reason + note)
    return signature


def _activity(drive: FloatArray, base: npt.NDArray[np.bool_], settled: npt.NDArray[np.bool_],
              width: int) -> float:  # fmt: skip
    """Share of whole periods in the settled window whose swing exceeds half the baseline's."""
    swing0 = float(drive[base].max() - drive[base].min())
    tail = drive[settled]
    periods = tail[: (tail.size // width) * width].reshape(-1, width)
    if periods.shape[0] == 0 or swing0 <= 0.0:
        return float("nan")
    return float(np.mean(periods.max(axis=1) - periods.min(axis=1) > swing0 / 2.0))


def _decide(evidence: dict[str, float], rules: EvidenceRules) -> Signature:
    """Score every class at once (module docstring) and pick the best. A rule on several
    features judges the first one measured; a rule with none measured is left out."""
    kinds = list(_RULES)
    flat = [
        (next((f for f in names if np.isfinite(evidence[f])), names[0]), sense)
        for kind in kinds
        for names, sense in _RULES[kind]
    ]
    value = np.array([evidence[name] for name, _ in flat])
    quiet, edge, clear = np.array([rules.limits[name] for name, _ in flat]).T
    high = np.array([sense == _HIGH for _, sense in flat])
    margin = np.where(high, (value - edge) / (clear - edge), (edge - value) / (edge - quiet))
    starts = np.cumsum([0] + [len(_RULES[kind]) for kind in kinds[:-1]])
    scores = dict(zip(kinds, np.fmin.reduceat(margin, starts).tolist(), strict=True))
    best = max(kinds, key=scores.__getitem__)
    lo = int(starts[kinds.index(best)])
    judged = [name for name, _ in flat[lo : lo + len(_RULES[best])]]
    used = tuple(name for name in judged if np.isfinite(evidence[name]))
    missing = [name for name in judged if not np.isfinite(evidence[name])]
    note = f" (no channel for {', '.join(missing)})" if missing else ""
    if scores[best] < rules.min_confidence:
        runner = sorted(scores.values())[-2]
        why = "conflicting" if scores[best] - runner < rules.min_confidence else "marginal"
        return Signature(
            "undetermined", 0.0, evidence, used, scores,
            f"{why} evidence: {best.replace('_', ' ')} scores only {scores[best]:.2f}{note}",
        )  # fmt: skip
    return Signature(
        best, min(1.0, scores[best]), evidence, used, scores,  # type: ignore[arg-type]
        f"{best.replace('_', ' ')}: {', '.join(used)} all clear their limits{note}",
    )  # fmt: skip
