"""Rehearsal: replay a recorded trace against candidate protection settings.

A firmware developer picks thresholds and debounce times for a rail's protection and wants
to know, before flashing them, what they would have done on recorded traces: which trips,
how many of them false, and how fast each labelled fault would have been caught.
:func:`rehearse` lists the trips of one settings set; :func:`sweep` scores thousands of
combinations in one vectorised pass; :func:`pareto_front` keeps the combinations that no
other beats on both false trips and latency.

Rules
-----
Every rule is written as ``signal > level`` on each sample k (``-inf`` where the rule cannot
hold: no reading, phase not present, blanked). Measured values keep their units; the rules
that watch a quantity falling below a threshold negate both sides.

* ``over_current`` (per phase): signal = current_a, level = ``oc_level_a``, A.
* ``over_temperature`` (per phase): signal = temp_c (NaN = no reading), level = ``ot_level_c``.
* ``imbalance`` (per phase): with m active phases carrying I_tot = sum of their currents, a
  present phase's deviation from an equal share, 100 |I_p - I_tot/m| / (I_tot/m) in %,
  level = ``imbalance_pct``. Evaluated only while I_tot > ``imbalance_min_load_a`` (>= 0, so
  the default 0 means "whenever the rail carries current"; a share of no current is
  undefined).
* ``dead_phase`` (per phase): a present phase whose current is below ``dead_floor_a`` while
  the mean current of the other present phases, (I_tot - I_p) / (m - 1), exceeds
  ``dead_others_min_a``: signal = -I_p (else -inf), level = -dead_floor_a.
* ``under_voltage`` (rail, phase -1 in results): signal = -vin_v (NaN = no reading),
  level = -uv_level_v.

Over-current and over-temperature watch every phase column; imbalance and dead phase only
the phases the trace reports as present (``active``), since an isolated phase is expected to
carry nothing. A rule whose level is not finite (NaN, +inf or -inf) is disabled.

Time base: every comparison of times runs on an integer clock of nanosecond ticks, so a
debounce equal to a whole number of sample intervals behaves the same on every trace. Sample
times given as binary floats are converted by :func:`to_ticks`: rounded to the nearest
multiple of a quantum q, the smallest power of ten of nanoseconds at least twice the float
spacing at the trace's largest time (q = 1 ns for times up to about 10^6 s; q = 1 us for epoch
seconds, whose float64 spacing today is about 0.24 us). Times that were whole multiples of q
before they became floats are thus recovered exactly. Durations (debounce, blanking) are
rounded to whole nanoseconds; label windows use the trace's quantum.

Debounce (identical here and in the reference loop of the tests): a rule trips at the first
sample k of a run of condition-true samples that starts at sample s with
``t_s <= t_k - debounce`` (debounce 0 trips on the first true sample); after a trip it re-arms
only when it is released, so a trip is a rising edge of the debounced condition.

Hysteresis: each rule has a release level (``oc_release_a``, ``ot_release_c``,
``imbalance_release_pct``, ``dead_release_a``, ``uv_release_v``). A tripped rule is released
at the first sample whose signal is at or beyond the release level (at or below it for the
rules watching a rising quantity, at or above it for dead phase and under-voltage), or whose
signal is undefined (no reading, blanked); it then re-arms. No release level (NaN, the
default) or one on the tripping side of the level means release as soon as the condition
clears, the behaviour without hysteresis. Release takes no debounce.
Vectorised form: with j0(k) the last sample where ``t_j <= t_k - debounce`` (none: not held)
the rule is held at k iff the condition holds on all samples j0(k)..k, i.e. the window minimum
h_k of the signal over j0(k)..k exceeds the level. Window minima come from a sparse table
(range-minimum query, O(n log n) per signal and O(n) per debounce value). A trip at level L is
a sample k with h_(k-1) <= L < h_k (h_(-1) = -inf), so for many levels at once the number of
trips is a sweep-line count over the intervals [h_(k-1), h_k) (two sorted arrays and two
``searchsorted`` calls), and the first trip at or after a sample is a descent through sparse
tables of the running extremes of h. Nothing of shape (n, n_phases, n_combinations) is
built; the loops run over rules, phases and the distinct values of the settings that change
the signal or its window (debounce, blanking, step, minimum load, others' minimum).

Load-step blanking (our decision): a load step is a sample i >= 1 whose rail current (sum of
all phase columns) differs from sample i-1 by more than ``step_a``; samples k with
``t_k - t_i < blanking_s`` after the latest step i <= k are blanked for over-current,
imbalance and dead phase (their signal is -inf, which also ends a run). Over-temperature and
under-voltage are not blanked: a load step does not make a hot junction or a sagging input
any less real. Blanking is off when ``blanking_s`` is 0 or ``step_a`` is NaN or inf.

Missing readings (temperature and input voltage, NaN = no reading): :func:`hold_readings`
applies a policy before the rules see the trace. ``hold_s > 0`` holds the last reading for up
to hold_s after it was taken (as firmware keeps acting on the last value it read; inf = for
ever); ``hold_s = 0`` treats a missing reading as clear (the condition is false there, which
ends a run and releases a tripped rule).

Scoring against labelled faults (:class:`FaultLabels`, windows [start_s, end_s] inclusive):
a trip is false when no label window of its phase covers its time (a rail-level
under-voltage trip is false unless any label window covers it). A label's latency is the
time of the first trip on its phase (any rule when its ``kind`` is ``"any"``, or only the
rule it names, one of :data:`RULES`) at or after the window start and not after its end,
minus the start; NaN = missed. A rule already held when the window opens (tripped before,
not released) detects nothing until it is released and trips again. The worst latency of a
combination is its largest label latency with a missed label counted as infinitely late
(``max_latency_s``: NaN when any label is missed; the band above the plot).

Failure policy: invalid arguments raise ValueError naming the argument.
"""

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, fields
from typing import Literal

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]
IntArray = npt.NDArray[np.intp]

RuleName = Literal["over_current", "over_temperature", "imbalance", "dead_phase", "under_voltage"]
RULES: tuple[RuleName, ...] = (
    "over_current",
    "over_temperature",
    "imbalance",
    "dead_phase",
    "under_voltage",
)
RAIL_PHASE = -1  # phase index of rail-level trips and labels
ANY_RULE = "any"  # label kind: a trip of any rule detects the fault


Int64Array = npt.NDArray[np.int64]
NS_PER_S = 1_000_000_000


def tick_quantum_ns(t_s: npt.ArrayLike) -> int:
    """The rounding quantum q, ns, for float times ``t_s`` (module docstring, time base).

    >>> tick_quantum_ns([0.0, 0.001]), tick_quantum_ns([1.7e9, 1.7e9 + 0.001])
    (1, 1000)
    """
    top = float(np.max(np.abs(np.asarray(t_s, dtype=np.float64)), initial=0.0))
    spacing_ns = float(np.spacing(top)) * NS_PER_S
    return int(10 ** max(0, math.ceil(math.log10(max(2.0 * spacing_ns, 1.0)))))


def to_ticks(t_s: npt.ArrayLike, quantum_ns: int = 1) -> Int64Array:
    """Float seconds to integer nanosecond ticks, rounded to a multiple of ``quantum_ns``.

    Whole seconds and the fraction are converted apart, so epoch times keep their digits.

    >>> to_ticks([1.7e9 + 0.002, 0.0025], 1000).tolist()
    [1700000000002000000, 2500000]
    """
    t = np.asarray(t_s, dtype=np.float64)
    whole = np.floor(t)
    frac_q = np.rint((t - whole) * (NS_PER_S / quantum_ns)).astype(np.int64)
    return np.asarray(whole.astype(np.int64) * NS_PER_S + frac_q * quantum_ns, dtype=np.int64)


@dataclass(frozen=True, eq=False, init=False)
class RehearsalTrace:
    """A recorded trace of one rail.

    t_s: (n,) strictly increasing sample times, s (any spacing), kept as integer nanosecond
    ticks ``t_ns`` (:func:`to_ticks` with ``quantum_ns`` from :func:`tick_quantum_ns`; t_s is
    then t_ns / 1e9); current_a: (n, n_phases) phase currents, A (finite); temp_c:
    (n, n_phases) temperatures, degC (NaN = no reading); vin_v: (n,) input voltage, V (NaN =
    no reading); active: optional (n, n_phases) bool, the phases the trace reports as present,
    i.e. not isolated (default: all). Stored as read-only arrays.

    >>> tr = RehearsalTrace([0.0, 1.0, 2.0], np.ones((3, 2)), np.full((3, 2), 40.0),
    ...                     [12.0, 12.0, 11.9])
    >>> tr.n_samples, tr.n_phases, bool(tr.active.all()), tr.t_ns.tolist()
    (3, 2, True, [0, 1000000000, 2000000000])
    """

    t_s: FloatArray
    t_ns: Int64Array
    quantum_ns: int
    current_a: FloatArray
    temp_c: FloatArray
    vin_v: FloatArray
    active: BoolArray

    def __init__(
        self,
        t_s: npt.ArrayLike,
        current_a: npt.ArrayLike,
        temp_c: npt.ArrayLike,
        vin_v: npt.ArrayLike,
        active: npt.ArrayLike | None = None,
    ) -> None:
        t = np.array(t_s, dtype=np.float64)
        if t.ndim != 1 or t.size == 0 or not np.all(np.isfinite(t)):
            raise ValueError("t_s must be a finite array of shape (n,) with n >= 1")
        if np.any(np.abs(t) >= 9e9):
            raise ValueError("t_s must be within +-9e9 s (the range of int64 nanoseconds)")
        quantum = tick_quantum_ns(t)
        ticks = to_ticks(t, quantum)
        if np.any(np.diff(ticks) <= 0):
            raise ValueError(f"t_s must be strictly increasing on a {quantum} ns clock")
        current = np.array(current_a, dtype=np.float64)
        if current.ndim != 2 or current.shape[0] != t.size or current.shape[1] == 0:
            raise ValueError("current_a must have shape (n, n_phases) with n_phases >= 1")
        if not np.all(np.isfinite(current)):
            raise ValueError("current_a must be finite")
        temp = np.array(temp_c, dtype=np.float64)
        if temp.shape != current.shape or np.any(np.isinf(temp)):
            raise ValueError("temp_c must have the shape of current_a and no inf (NaN = none)")
        vin = np.array(vin_v, dtype=np.float64)
        if vin.shape != t.shape or np.any(np.isinf(vin)):
            raise ValueError("vin_v must have shape (n,) and no inf (NaN = no reading)")
        if active is None:
            present = np.ones(current.shape, dtype=bool)
        else:
            present = np.array(active)
            if present.shape != current.shape or present.dtype != np.bool_:
                raise ValueError("active must be a bool array of the shape of current_a")
        object.__setattr__(self, "quantum_ns", quantum)
        for name, arr in (
            ("t_s", ticks / NS_PER_S),
            ("t_ns", ticks),
            ("current_a", current),
            ("temp_c", temp),
            ("vin_v", vin),
            ("active", present),
        ):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    @property
    def n_samples(self) -> int:
        """Number of samples n."""
        return int(self.t_s.size)

    @property
    def n_phases(self) -> int:
        """Number of phase columns."""
        return int(self.current_a.shape[1])


def hold_readings(trace: RehearsalTrace, hold_s: float) -> RehearsalTrace:
    """``trace`` with each missing temperature and input-voltage reading replaced by the last
    reading of its column taken at most ``hold_s`` before (module docstring; 0 = clear).

    >>> tr = RehearsalTrace(np.arange(4.0), np.ones((4, 1)), [[90.0], [np.nan], [np.nan],
    ...                     [np.nan]], [12.0, np.nan, 11.0, np.nan])
    >>> held = hold_readings(tr, 1.5)
    >>> held.temp_c[:, 0].tolist(), held.vin_v.tolist()
    ([90.0, 90.0, nan, nan], [12.0, 12.0, 11.0, 11.0])
    """
    if not (hold_s >= 0.0):
        raise ValueError("hold_s must be >= 0 (0: a missing reading clears, inf: hold for ever)")
    if hold_s == 0.0:
        return trace
    hold_ns = np.inf if math.isinf(hold_s) else round(hold_s * NS_PER_S)
    t = trace.t_ns

    def held(x: FloatArray) -> FloatArray:
        rows = np.arange(x.shape[0])[:, None]
        last = np.maximum.accumulate(np.where(np.isnan(x), -1, rows), axis=0)
        cols = np.arange(x.shape[1])[None, :]
        source = x[np.maximum(last, 0), cols]
        fresh = (last >= 0) & ((t[:, None] - t[np.maximum(last, 0)]) <= hold_ns)
        return np.where(fresh, source, np.nan)

    out = object.__new__(RehearsalTrace)
    for name in ("t_s", "t_ns", "quantum_ns", "current_a", "active"):
        object.__setattr__(out, name, getattr(trace, name))
    for name, arr in (("temp_c", held(trace.temp_c)), ("vin_v", held(trace.vin_v[:, None])[:, 0])):
        arr.setflags(write=False)
        object.__setattr__(out, name, arr)
    return out


@dataclass(frozen=True)
class ProtectionSettings:
    """One set of protection settings (defaults: every rule disabled, no blanking).

    Levels (disabled when not finite): oc_level_a (A), ot_level_c (degC), imbalance_pct (%),
    dead_floor_a (A), uv_level_v (V). Release levels in the same units (NaN: release where the
    condition clears): oc_release_a, ot_release_c, imbalance_release_pct, dead_release_a,
    uv_release_v. Debounce times, s, finite >= 0: oc_debounce_s, ot_debounce_s,
    imbalance_debounce_s, dead_debounce_s (how long a phase must read near zero before it
    counts as dead), uv_debounce_s. imbalance_min_load_a:
    finite >= 0, A; dead_others_min_a: finite, A; blanking_s: finite >= 0, s; step_a: >= 0,
    A, or NaN / inf for no blanking. See the module docstring for the rules.

    >>> ProtectionSettings(oc_level_a=30.0).oc_debounce_s
    0.0
    """

    oc_level_a: float = np.nan
    oc_debounce_s: float = 0.0
    oc_release_a: float = np.nan
    ot_level_c: float = np.nan
    ot_debounce_s: float = 0.0
    ot_release_c: float = np.nan
    imbalance_pct: float = np.nan
    imbalance_debounce_s: float = 0.0
    imbalance_release_pct: float = np.nan
    imbalance_min_load_a: float = 0.0
    dead_floor_a: float = np.nan
    dead_debounce_s: float = 0.0
    dead_release_a: float = np.nan
    dead_others_min_a: float = 0.0
    uv_level_v: float = np.nan
    uv_debounce_s: float = 0.0
    uv_release_v: float = np.nan
    blanking_s: float = 0.0
    step_a: float = np.inf


SETTING_NAMES: tuple[str, ...] = tuple(f.name for f in fields(ProtectionSettings))
_DEFAULTS = asdict(ProtectionSettings())
_NONNEGATIVE = (
    "oc_debounce_s",
    "ot_debounce_s",
    "imbalance_debounce_s",
    "dead_debounce_s",
    "uv_debounce_s",
    "imbalance_min_load_a",
    "blanking_s",
)


@dataclass(frozen=True, eq=False, init=False)
class ProtectionGrid:
    """C combinations of protection settings, one (C,) float array per setting name.

    ``columns`` maps names of :class:`ProtectionSettings` fields to scalars or 1-D arrays;
    they are broadcast to a common length C, and a missing name takes its default. ValueError
    names an unknown or invalid setting.

    >>> g = ProtectionGrid.product({"oc_level_a": [20.0, 30.0], "oc_debounce_s": [0.0, 0.1, 0.2]})
    >>> g.size, g.columns["oc_level_a"].tolist()
    (6, [20.0, 20.0, 20.0, 30.0, 30.0, 30.0])
    >>> g.settings(4).oc_debounce_s
    0.1
    """

    columns: Mapping[str, FloatArray]

    def __init__(self, columns: Mapping[str, npt.ArrayLike]) -> None:
        unknown = sorted(set(columns) - set(SETTING_NAMES))
        if unknown:
            raise ValueError(f"unknown protection setting(s): {', '.join(unknown)}")
        raw = {
            name: np.array(columns.get(name, _DEFAULTS[name]), dtype=np.float64)
            for name in SETTING_NAMES
        }
        for name, arr in raw.items():
            if arr.ndim > 1:
                raise ValueError(f"{name} must be a scalar or a 1-D array over combinations")
        try:
            (size,) = np.broadcast_shapes(*(arr.shape for arr in raw.values()), (1,))
        except ValueError:
            raise ValueError("the setting arrays must all have the same length C") from None
        cols = {name: np.broadcast_to(arr, (size,)).copy() for name, arr in raw.items()}
        for name in _NONNEGATIVE:
            if not np.all(np.isfinite(cols[name]) & (cols[name] >= 0.0)):
                raise ValueError(f"{name} must be finite and >= 0")
        if not np.all(np.isfinite(cols["dead_others_min_a"])):
            raise ValueError("dead_others_min_a must be finite")
        for name in ("oc_release_a", "ot_release_c", "imbalance_release_pct", "dead_release_a",
                     "uv_release_v"):  # fmt: skip
            if np.any(np.isinf(cols[name])):
                raise ValueError(f"{name} must be finite (NaN: no hysteresis)")
        step = cols["step_a"]
        if np.any(step < 0.0) or np.any(np.isneginf(step)):
            raise ValueError("step_a must be >= 0 (NaN or inf: no blanking)")
        for arr in cols.values():
            arr.setflags(write=False)
        object.__setattr__(self, "columns", cols)

    @classmethod
    def product(cls, axes: Mapping[str, npt.ArrayLike]) -> "ProtectionGrid":
        """Every combination of the given values (Cartesian product, last name fastest)."""
        values = [np.atleast_1d(np.array(v, dtype=np.float64)) for v in axes.values()]
        if any(v.ndim != 1 for v in values):
            raise ValueError("each axis of the product must be a scalar or a 1-D array")
        mesh = np.meshgrid(*values, indexing="ij") if values else []
        return cls({name: m.reshape(-1) for name, m in zip(axes, mesh, strict=True)})

    @classmethod
    def from_settings(cls, settings: Sequence[ProtectionSettings]) -> "ProtectionGrid":
        """Stack individual settings sets into a grid (C = len(settings) >= 1)."""
        if len(settings) == 0:
            raise ValueError("settings must hold at least one ProtectionSettings")
        rows = [asdict(s) for s in settings]
        return cls({name: np.array([row[name] for row in rows]) for name in SETTING_NAMES})

    @property
    def size(self) -> int:
        """Number of combinations C."""
        return int(self.columns["oc_level_a"].size)

    def settings(self, index: int) -> ProtectionSettings:
        """Combination ``index`` as one :class:`ProtectionSettings`."""
        return ProtectionSettings(**{k: float(v[index]) for k, v in self.columns.items()})


@dataclass(frozen=True, eq=False, init=False)
class FaultLabels:
    """Labelled fault windows of a trace.

    start_s, end_s: (m,) window bounds, s, end >= start, inclusive; phase: (m,) int, the
    phase the fault is on (-1 = rail level); kind: m strings, ``"any"`` (any rule's trip
    detects it) or one of :data:`RULES` (only that rule's trips count). ValueError names an
    unknown kind, and a kind that cannot trip on the label's phase (under_voltage is a rail
    rule, phase -1; the others are per phase).

    >>> FaultLabels([1.0], [2.0], [0], ["dead_phase"]).size
    1
    """

    start_s: FloatArray
    end_s: FloatArray
    phase: IntArray
    kind: tuple[str, ...]

    def __init__(
        self,
        start_s: npt.ArrayLike,
        end_s: npt.ArrayLike,
        phase: npt.ArrayLike,
        kind: Sequence[str],
    ) -> None:
        start = np.array(start_s, dtype=np.float64).reshape(-1)
        end = np.array(end_s, dtype=np.float64).reshape(-1)
        phase_idx = np.array(phase).reshape(-1)
        kinds = tuple(kind)
        if not (np.all(np.isfinite(start)) and np.all(np.isfinite(end))):
            raise ValueError("start_s and end_s must be finite")
        if end.size != start.size or np.any(end < start):
            raise ValueError("end_s must have the length of start_s and be >= start_s")
        if phase_idx.size != start.size or (phase_idx.size and phase_idx.dtype.kind not in "iu"):
            raise ValueError("phase must hold one integer per label")
        if len(kinds) != start.size or not all(isinstance(k, str) for k in kinds):
            raise ValueError("kind must hold one string per label")
        for j, (k, p) in enumerate(zip(kinds, phase_idx.tolist(), strict=True)):
            if k not in (ANY_RULE, *RULES):
                raise ValueError(f"kind[{j}] '{k}' is not 'any' or one of {', '.join(RULES)}")
            if k != ANY_RULE and (k == "under_voltage") != (p == RAIL_PHASE):
                raise ValueError(
                    f"kind[{j}] '{k}' never trips on phase {p}: under_voltage is the rail's "
                    "rule (phase -1), the others watch single phases"
                )
        phase_idx = phase_idx.astype(np.intp)
        for name, arr in (("start_s", start), ("end_s", end), ("phase", phase_idx)):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        object.__setattr__(self, "kind", kinds)

    @property
    def size(self) -> int:
        """Number of labels m."""
        return int(self.start_s.size)


@dataclass(frozen=True)
class Trip:
    """One trip: sample index, time (s), phase (-1 = rail), rule, and the measured value at
    the trip sample in the rule's unit (A, degC, %, A, V)."""

    sample: int
    time_s: float
    phase: int
    rule: RuleName
    value: float


@dataclass(frozen=True, eq=False)
class SweepResult:
    """Scores of C combinations against a trace and its m labels.

    trips: (C,) trips of all rules; trips_by_rule: (C, 5) per rule in :data:`RULES` order;
    false_trips: (C,) trips no label window of their phase covers; latency_s: (C, m) per
    label, s (NaN = missed); missed: (C,) labels missed; mean_latency_s: (C,) mean over the
    detected labels (NaN if none); max_latency_s: (C,) largest latency, NaN when any label is
    missed or there are no labels (a missed label is the worst latency).
    """

    trips: IntArray
    trips_by_rule: IntArray
    false_trips: IntArray
    latency_s: FloatArray
    missed: IntArray
    mean_latency_s: FloatArray
    max_latency_s: FloatArray


@dataclass(frozen=True)
class _Rule:
    name: RuleName
    level: str  # setting holding the level
    debounce: str  # setting holding the debounce time
    sign: float  # signal = sign * measured value, level = sign * setting
    blanked: bool  # subject to load-step blanking
    extra: str | None  # setting that changes which samples the rule watches
    release: str  # setting holding the release level (hysteresis)


_RULE_SPECS = (
    _Rule("over_current", "oc_level_a", "oc_debounce_s", 1.0, True, None, "oc_release_a"),
    _Rule("over_temperature", "ot_level_c", "ot_debounce_s", 1.0, False, None, "ot_release_c"),
    _Rule(
        "imbalance",
        "imbalance_pct",
        "imbalance_debounce_s",
        1.0,
        True,
        "imbalance_min_load_a",
        "imbalance_release_pct",
    ),
    _Rule(
        "dead_phase",
        "dead_floor_a",
        "dead_debounce_s",
        -1.0,
        True,
        "dead_others_min_a",
        "dead_release_a",
    ),
    _Rule("under_voltage", "uv_level_v", "uv_debounce_s", -1.0, False, None, "uv_release_v"),
)


@dataclass(frozen=True, eq=False)
class _Derived:
    """Trace quantities every rule draws on, computed once per call."""

    trace: RehearsalTrace
    step_a: FloatArray  # (n,) rail current change from sample k-1 (phase-order sums), 0 at k = 0
    present_a: FloatArray  # (n,) I_tot, sum over present phases in phase order
    deviation_pct: FloatArray  # (n, P) share deviation, NaN where undefined
    others_a: FloatArray  # (n, P) mean of the other present phases, NaN where undefined


def _phase_order_sum(x: FloatArray) -> FloatArray:
    """Row sums of (n, P) added phase by phase in index order (a fixed, documented order)."""
    total = np.zeros(x.shape[0])
    for p in range(x.shape[1]):
        total += x[:, p]
    return total


def _derive(trace: RehearsalTrace) -> _Derived:
    current, present = trace.current_a, trace.active
    rail = _phase_order_sum(current)
    step = np.concatenate([[0.0], np.abs(np.diff(rail))])
    count = present.sum(axis=1).astype(np.float64)
    total = _phase_order_sum(np.where(present, current, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = total / count
        deviation = 100.0 * np.abs(current - mean[:, None]) / mean[:, None]
        others = (total[:, None] - current) / (count[:, None] - 1.0)
    deviation = np.where(present & (total[:, None] > 0.0), deviation, np.nan)
    others = np.where(present & (count[:, None] >= 2.0), others, np.nan)
    return _Derived(trace, step, total, deviation, others)


def _blank_key(blanking_s: FloatArray, step_a: FloatArray) -> FloatArray:
    """(C, 2) blanking settings with every 'off' spelling folded into (0, inf)."""
    off = (blanking_s == 0.0) | ~np.isfinite(step_a)
    return np.column_stack([np.where(off, 0.0, blanking_s), np.where(off, np.inf, step_a)])


def _blanked(d: _Derived, blanking_s: float, step_a: float) -> BoolArray:
    """(n,) samples blanked after a load step (module docstring)."""
    t = d.trace.t_ns
    idx = np.arange(t.size)
    last = np.maximum.accumulate(np.where(d.step_a > step_a, idx, -1))
    return (last >= 0) & (t - t[np.maximum(last, 0)] < round(blanking_s * NS_PER_S))


def _signal(d: _Derived, rule: _Rule, key: FloatArray) -> FloatArray:
    """(n, P) signal of ``rule`` ((n, 1) for the rail rule); key = (blanking_s, step_a, extra)."""
    tr = d.trace
    if rule.name == "over_current":
        measured = tr.current_a
    elif rule.name == "over_temperature":
        measured = tr.temp_c
    elif rule.name == "imbalance":
        measured = np.where(d.present_a[:, None] > key[2], d.deviation_pct, np.nan)
    elif rule.name == "dead_phase":
        measured = np.where(d.others_a > key[2], tr.current_a, np.nan)
    else:
        measured = tr.vin_v[:, None]
    undefined = np.isnan(measured)
    if rule.blanked and key[0] > 0.0:
        undefined = undefined | _blanked(d, float(key[0]), float(key[1]))[:, None]
    return np.where(undefined, -np.inf, rule.sign * measured)


def _sparse_table(x: FloatArray, op: np.ufunc) -> FloatArray:
    """(K, n) table with row j = op over x[i : min(i + 2^j, n)], 2^(K-1) <= n < 2^K."""
    n = x.size
    table = np.empty((max(1, n.bit_length()), n))
    table[0] = x
    for j in range(1, table.shape[0]):
        half = 1 << (j - 1)
        table[j] = table[j - 1]
        op(table[j - 1, :-half], table[j - 1, half:], out=table[j, :-half])
    return table


def _held(t_ns: Int64Array, min_table: FloatArray, debounce_s: float) -> FloatArray:
    """(n,) window minima h_k of the signal over j0(k)..k; -inf where no j0(k) exists."""
    k = np.arange(t_ns.size)
    lo = np.searchsorted(t_ns, t_ns - round(debounce_s * NS_PER_S), side="right") - 1
    start = np.maximum(lo, 0)
    row = np.frexp((k - start + 1).astype(np.float64))[1] - 1  # floor(log2(window length))
    h = np.minimum(min_table[row, start], min_table[row, k - np.left_shift(1, row) + 1])
    return np.where(lo >= 0, h, -np.inf)


def _first_index(table: FloatArray, start: IntArray, level: FloatArray, *, above: bool) -> IntArray:
    """First i >= start with x_i > level (``above``, max table) or x_i <= level (min table).

    start, level: broadcastable arrays; returns n where there is none. Binary lifting: skip a
    block of 2^j samples when none of them satisfies the condition, j from large to small.
    """
    n = table.shape[1]
    pos = np.array(np.broadcast_arrays(start, level)[0], dtype=np.intp)
    for j in range(table.shape[0] - 1, -1, -1):
        block = table[j, np.minimum(pos, n - 1)]
        skip = (pos < n) & ((block <= level) if above else (block > level))
        pos = pos + np.where(skip, 1 << j, 0)
    return np.minimum(pos, n)


def _rising(h: FloatArray, released: BoolArray | None = None) -> tuple[FloatArray, FloatArray]:
    """(P, Q): a trip at level L on sample k iff P_k <= L < h_k, and the rule is tripped
    after sample k iff Q_k > L.

    Without hysteresis (``released`` None) P_k = h_(k-1) (h_(-1) = -inf) and Q = h. With
    ``released`` (n,) the samples at or beyond the release level: the samples split into
    segments that each start at a release (or at sample 0); Q_k is the running maximum of h
    over k's segment up to k, and P_k that of the samples before k (-inf at a segment's start),
    since a rule trips at most once between two releases.
    """
    if released is None:
        return np.concatenate([[-np.inf], h[:-1]]), h
    n = h.size
    segment = np.cumsum(released | (np.arange(n) == 0))
    values, rank = np.unique(h, return_inverse=True)
    rank = rank.reshape(-1)
    stride = np.int64(values.size)
    key = np.maximum.accumulate(segment.astype(np.int64) * stride + rank)
    running = values[key - segment * stride]
    starts = np.concatenate([[True], segment[1:] != segment[:-1]])
    return np.where(starts, -np.inf, np.concatenate([[-np.inf], running[:-1]])), running


def _edge_count(prev: FloatArray, cur: FloatArray, keep: BoolArray, level: FloatArray) -> IntArray:
    """Number of trips at each level (C,) among the samples ``keep`` (sweep line over the
    intervals [prev_k, cur_k) of :func:`_rising`)."""
    sel = keep & (prev < cur)
    starts, ends = np.sort(prev[sel]), np.sort(cur[sel])
    return np.asarray(
        np.searchsorted(starts, level, side="right") - np.searchsorted(ends, level, side="right"),
        dtype=np.intp,
    )


def _first_trip_from(
    h: FloatArray, q: FloatArray, release: IntArray | None, first: IntArray, level: FloatArray
) -> IntArray:
    """Index of the first trip at or after sample ``first`` (broadcast with level); n if none.

    q: the tripped-state signal of :func:`_rising`; release: (n + 1,) index of the first
    release at or after each sample (n: none), or None without hysteresis (a release is then
    where h drops to the level). If the rule is tripped at first - 1 (tripped earlier, not
    released) the next trip comes after the next release.
    """
    n = h.size
    max_table = _sparse_table(h, np.maximum)
    before = np.where(first > 0, q[np.clip(first - 1, 0, n - 1)], -np.inf)
    armed = before <= level
    if release is None:
        drop = _first_index(_sparse_table(h, np.minimum), first, level, above=False)
    else:
        drop = np.broadcast_to(release[np.minimum(first, n)], armed.shape)
    rearm = np.where(armed, first - 1, drop)
    return _first_index(max_table, rearm + 1, level, above=True)


def _release_split(level: FloatArray, release: FloatArray) -> tuple[FloatArray, BoolArray]:
    """(C,) release levels in signal units and which combinations have hysteresis (a finite
    release level strictly on the clearing side of the level)."""
    with np.errstate(invalid="ignore"):
        hyst = np.isfinite(release) & (release < level)
    return np.where(hyst, release, np.nan), hyst


def _next_release(released: BoolArray) -> IntArray:
    """(n + 1,) index of the first release at or after each sample; n where none."""
    n = released.size
    idx = np.where(released, np.arange(n), n)
    return np.asarray(np.concatenate([np.minimum.accumulate(idx[::-1])[::-1], [n]]), dtype=np.intp)


def _validate_labels(trace: RehearsalTrace, labels: FaultLabels) -> None:
    if np.any((labels.phase < RAIL_PHASE) | (labels.phase >= trace.n_phases)):
        raise ValueError(f"labels.phase must be in -1..{trace.n_phases - 1}")


def rehearse(trace: RehearsalTrace, settings: ProtectionSettings) -> list[Trip]:
    """Every trip of one settings set over ``trace``, ordered by sample, phase and rule.

    >>> t = np.arange(8.0)  # one sample per second
    >>> current = np.array([[10.0, 10.0]] * 8)
    >>> current[2:6, 1] = 25.0  # phase 1 over 20 A on samples 2..5
    >>> tr = RehearsalTrace(t, current, np.full((8, 2), 50.0), np.full(8, 12.0))
    >>> [(trip.sample, trip.phase, trip.rule, trip.value)
    ...  for trip in rehearse(tr, ProtectionSettings(oc_level_a=20.0, oc_debounce_s=2.0))]
    [(4, 1, 'over_current', 25.0)]
    >>> rehearse(tr, ProtectionSettings(oc_level_a=20.0, oc_debounce_s=3.5))  # run too short
    []
    """
    grid = ProtectionGrid.from_settings([settings])
    d = _derive(trace)
    found: list[Trip] = []
    for rule in _RULE_SPECS:
        level = rule.sign * float(grid.columns[rule.level][0])
        if not np.isfinite(level):
            continue
        blank = _blank_key(grid.columns["blanking_s"], grid.columns["step_a"])[0]
        extra = float(grid.columns[rule.extra][0]) if rule.extra else 0.0
        signal = _signal(d, rule, np.append(blank, extra))
        debounce = float(grid.columns[rule.debounce][0])
        rel, hyst = _release_split(np.array([level]), rule.sign * grid.columns[rule.release])
        for col in range(signal.shape[1]):
            phase = RAIL_PHASE if rule.name == "under_voltage" else col
            h = _held(trace.t_ns, _sparse_table(signal[:, col], np.minimum), debounce)
            prev, q = _rising(h, signal[:, col] <= rel[0] if hyst[0] else None)
            for k in np.flatnonzero((prev <= level) & (level < q)).tolist():
                value = rule.sign * float(signal[k, col])
                found.append(Trip(k, float(trace.t_s[k]), phase, rule.name, value))
    order = {name: i for i, name in enumerate(RULES)}
    return sorted(found, key=lambda trip: (trip.sample, trip.phase, order[trip.rule]))


def _covered(trace: RehearsalTrace, start_ns: Int64Array, end_ns: Int64Array,
             phase: IntArray) -> BoolArray:  # fmt: skip
    """(n, P + 1) samples inside a label window of each phase; last column: any label."""
    t = trace.t_ns
    lo = np.searchsorted(t, start_ns, side="left")
    hi = np.searchsorted(t, end_ns, side="right")
    n_phases = trace.n_phases
    cols = np.where(phase == RAIL_PHASE, n_phases, phase)  # rail: "any" column
    phased = phase != RAIL_PHASE
    depth = np.zeros((t.size + 1, n_phases + 1), dtype=np.int64)
    for rows, column in ((slice(None), cols), (phased, np.full(cols.shape, n_phases))):
        np.add.at(depth, (lo[rows], column[rows]), 1)
        np.add.at(depth, (hi[rows], column[rows]), -1)
    return np.cumsum(depth, axis=0)[:-1] > 0


def sweep(
    trace: RehearsalTrace, grid: ProtectionGrid, labels: FaultLabels | None = None
) -> SweepResult:
    """Score every combination of ``grid`` over ``trace`` in one vectorised pass.

    Trips equal those of :func:`rehearse` for each combination; see the module docstring for
    false trips and latency. Work is O((n + C) log n) per rule, phase and distinct value of
    the signal-shaping settings (and of the release level where one is set); memory
    O(n log n + C m).

    >>> t = np.arange(10.0)  # one sample per second
    >>> current = np.full((10, 2), 10.0)
    >>> current[3:7, 0] = 25.0  # a real fault on phase 0 from 3 s to 6 s
    >>> current[8, 1] = 30.0  # a one-sample spike on phase 1
    >>> tr = RehearsalTrace(t, current, np.full((10, 2), 50.0), np.full(10, 12.0))
    >>> labels = FaultLabels([3.0], [6.0], [0], ["over_current"])
    >>> grid = ProtectionGrid.product({"oc_level_a": [20.0, 28.0], "oc_debounce_s": [0.0, 1.0]})
    >>> res = sweep(tr, grid, labels)
    >>> res.trips.tolist(), res.false_trips.tolist(), res.missed.tolist()
    ([2, 1, 1, 0], [1, 0, 1, 0], [0, 0, 1, 1])
    >>> res.latency_s[:, 0].tolist()
    [0.0, 1.0, nan, nan]
    """
    if labels is None:
        labels = FaultLabels(np.empty(0), np.empty(0), np.empty(0, dtype=np.intp), ())
    _validate_labels(trace, labels)
    d = _derive(trace)
    t = trace.t_ns
    n_comb, n_labels = grid.size, labels.size
    by_rule = np.zeros((n_comb, len(RULES)), dtype=np.intp)
    false_trips = np.zeros(n_comb, dtype=np.intp)
    latency_ns = np.full((n_comb, n_labels), np.inf)
    start_ns = to_ticks(labels.start_s, trace.quantum_ns)
    end_ns = to_ticks(labels.end_s, trace.quantum_ns)
    covered = _covered(trace, start_ns, end_ns, labels.phase)
    first = np.searchsorted(t, start_ns, side="left")
    last = np.searchsorted(t, end_ns, side="right") - 1
    cols = grid.columns
    blank = _blank_key(cols["blanking_s"], cols["step_a"])
    for r, rule in enumerate(_RULE_SPECS):
        level = rule.sign * cols[rule.level]
        enabled = np.flatnonzero(np.isfinite(level))
        if enabled.size == 0:
            continue
        keys = np.column_stack(
            [
                blank if rule.blanked else np.zeros((n_comb, 2)),
                cols[rule.extra] if rule.extra else np.zeros(n_comb),
            ]
        )[enabled]
        key_values, key_of = np.unique(keys, axis=0, return_inverse=True)
        counting = np.isin(labels.kind, (rule.name, ANY_RULE))
        release, hyst = _release_split(level, rule.sign * cols[rule.release])
        for g, key in enumerate(key_values):
            members = enabled[key_of.reshape(-1) == g]
            signal = _signal(d, rule, key)
            debounces, debounce_of = np.unique(cols[rule.debounce][members], return_inverse=True)
            for col in range(signal.shape[1]):
                phase = RAIL_PHASE if rule.name == "under_voltage" else col
                outside = ~covered[:, trace.n_phases if phase == RAIL_PHASE else col]
                mine = np.flatnonzero(counting & (labels.phase == phase))
                table = _sparse_table(signal[:, col], np.minimum)
                for q, debounce in enumerate(debounces.tolist()):
                    at_debounce = members[debounce_of.reshape(-1) == q]
                    h = _held(t, table, debounce)
                    # one pass without hysteresis, one per distinct release level
                    releases = np.unique(release[at_debounce][hyst[at_debounce]])
                    for rel in [np.nan, *releases.tolist()]:
                        if np.isnan(rel):
                            idx = at_debounce[~hyst[at_debounce]]
                            released, next_rel = None, None
                        else:
                            idx = at_debounce[release[at_debounce] == rel]
                            released = signal[:, col] <= rel
                            next_rel = _next_release(released)
                        if idx.size == 0:
                            continue
                        prev, held = _rising(h, released)
                        lv = level[idx]
                        by_rule[idx, r] += _edge_count(prev, held, np.ones(t.size, bool), lv)
                        false_trips[idx] += _edge_count(prev, held, outside, lv)
                        if mine.size == 0:
                            continue
                        k = _first_trip_from(h, held, next_rel, first[mine][None, :], lv[:, None])
                        hit = k <= last[mine][None, :]
                        lat = np.where(hit, t[np.minimum(k, t.size - 1)] - start_ns[mine], np.inf)
                        block = np.ix_(idx, mine)
                        latency_ns[block] = np.minimum(latency_ns[block], lat)
    latency = np.where(np.isinf(latency_ns), np.nan, latency_ns / NS_PER_S)
    detected = ~np.isnan(latency)
    n_detected = detected.sum(axis=1)
    with np.errstate(invalid="ignore"):
        mean = np.where(detected, latency, 0.0).sum(axis=1) / n_detected
    worst = np.where(detected, latency, -np.inf).max(axis=1, initial=-np.inf)
    return SweepResult(
        trips=by_rule.sum(axis=1),
        trips_by_rule=by_rule,
        false_trips=false_trips,
        latency_s=latency,
        missed=(n_labels - n_detected).astype(np.intp),
        mean_latency_s=mean,
        max_latency_s=np.where((n_detected == n_labels) & (n_labels > 0), worst, np.nan),
    )


def pareto_front(false_trips: npt.ArrayLike, latency_s: npt.ArrayLike) -> IntArray:
    """Indices of the combinations no other beats on both criteria (both minimised).

    false_trips, latency_s: (C,); NaN latency counts as the worst (inf). A combination is
    dropped when another has <= on both and < on one; ties are all kept. Returned in
    ascending false trips, then latency, then index.

    >>> pareto_front([0, 1, 0, 2, 3], [np.nan, 0.2, 0.5, 0.1, 0.1]).tolist()
    [2, 1, 3]
    """
    f = np.asarray(false_trips, dtype=np.float64)
    lat = np.asarray(latency_s, dtype=np.float64)
    if f.ndim != 1 or lat.shape != f.shape:
        raise ValueError("false_trips and latency_s must both have shape (C,)")
    if np.any(np.isnan(f)):
        raise ValueError("false_trips must not be NaN")
    lat = np.where(np.isnan(lat), np.inf, lat)
    order = np.lexsort((np.arange(f.size), lat, f))
    fs, ls = f[order], lat[order]
    new_f = np.concatenate([[True], fs[1:] != fs[:-1]]) if f.size else np.zeros(0, dtype=bool)
    # best latency among strictly fewer false trips, and the best within the same count
    best_so_far = np.minimum.accumulate(ls) if f.size else ls
    group = np.cumsum(new_f) - 1
    group_start = np.flatnonzero(new_f)
    before = np.concatenate([[np.inf], best_so_far[group_start[1:] - 1]])[group]
    same = ls[group_start][group]
    keep = ((group == 0) | (before > ls)) & (same >= ls)
    return np.asarray(order[keep], dtype=np.intp)
