"""Typed answers of the service, as plain frozen dataclasses built from the JSON.

Every model is built with ``Model.from_json``: fields the service adds later are ignored (so a
newer service does not break an older client), a missing field without a default or a value
of the wrong type raises ``UnexpectedResponse`` naming where it is.
"""

from __future__ import annotations

import dataclasses
import types
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, ClassVar, Self, Union, get_args, get_origin, get_type_hints

from phaseward_client.errors import UnexpectedResponse

_HINTS: dict[type, dict[str, Any]] = {}


def _hints(cls: type) -> dict[str, Any]:
    if cls not in _HINTS:
        _HINTS[cls] = get_type_hints(cls)
    return _HINTS[cls]


def _convert(tp: Any, value: object, path: str) -> object:
    """``value`` (parsed JSON) checked against, and turned into, the type ``tp``."""
    if tp is Any or tp is object:
        return value
    origin = get_origin(tp)
    if origin is Union or origin is types.UnionType:
        args = get_args(tp)
        if value is None:
            if type(None) in args:
                return None
            raise UnexpectedResponse("is null", path=path)
        problems: list[str] = []
        for arg in args:
            if arg is type(None):
                continue
            try:
                return _convert(arg, value, path)
            except UnexpectedResponse as err:
                problems.append(err.detail)
        raise UnexpectedResponse("; ".join(problems), path=path)
    if origin is list:
        if not isinstance(value, list):
            raise UnexpectedResponse(f"expected a list, got {type(value).__name__}", path=path)
        (item,) = get_args(tp)
        return [_convert(item, v, f"{path}[{k}]") for k, v in enumerate(value)]
    if origin is dict:
        if not isinstance(value, dict):
            raise UnexpectedResponse(f"expected an object, got {type(value).__name__}", path=path)
        _, item = get_args(tp)
        return {str(k): _convert(item, v, f"{path}.{k}") for k, v in value.items()}
    if isinstance(tp, type) and issubclass(tp, Model):
        return tp.from_json(value, path=path)
    if tp is float:
        if isinstance(value, int | float) and not isinstance(value, bool):
            return float(value)
    elif tp is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
    elif tp is str or tp is bool:
        if isinstance(value, tp):
            return value
    else:  # pragma: no cover - a model declared a type this converter does not know
        raise TypeError(f"{path}: cannot convert to {tp!r}")
    raise UnexpectedResponse(
        f"expected {tp.__name__}, got {type(value).__name__} {value!r:.40}", path=path
    )


class Model:
    """Base of the answer dataclasses."""

    __dataclass_fields__: ClassVar[dict[str, dataclasses.Field[Any]]]

    @classmethod
    def from_json(cls, data: object, *, path: str = "") -> Self:
        """Build from parsed JSON (a dict); unknown keys are ignored."""
        where = path or cls.__name__
        if not isinstance(data, dict):
            raise UnexpectedResponse(f"expected an object, got {type(data).__name__}", path=where)
        hints = _hints(cls)
        values: dict[str, object] = {}
        for f in dataclasses.fields(cls):
            if f.name in data:
                values[f.name] = _convert(hints[f.name], data[f.name], f"{where}.{f.name}")
            elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                raise UnexpectedResponse("missing", path=f"{where}.{f.name}")
        factory: Callable[..., Self] = cls
        return factory(**values)


# --- rails and samples -------------------------------------------------------------------


@dataclass(frozen=True)
class DefinitionWarning(Model):
    """Something unusual about a stored definition: the field, the rule's name, the detail."""

    field: str
    rule: str
    detail: str


@dataclass(frozen=True)
class Rail(Model):
    """A stored rail definition (``spec`` is the definition as the service stored it, with
    its defaults filled in; ``version`` grows with every PUT). ``warnings``: what is unusual
    about it, in the answer of a create or put (empty on reads)."""

    id: str
    version: int
    created: str
    updated: str
    spec: dict[str, Any]
    warnings: list[DefinitionWarning] = field(default_factory=list)


@dataclass(frozen=True)
class IngestResult(Model):
    """The answer to a post of samples: how many were new, resent (``duplicates``, absorbed)
    or older than the live state (``late``, stored but not judged), and the rail condition.
    ``waiting``: the rail's routine samples stored and left to be judged with its next ones
    (a server with ``PHASEWARD_JUDGE_WITHIN_S`` set); the condition is then that of the
    last judged sample."""

    stored: int
    duplicates: int
    late: int
    condition: str | None
    version: int
    rejected: list[dict[str, Any]] = field(default_factory=list)
    waiting: int = 0


@dataclass(frozen=True)
class SampleWindow(Model):
    """Stored samples, oldest first; the per-phase lists are indexed by phase."""

    rail_id: str
    count: int
    truncated: bool
    seq: list[int]
    time_s: list[float]
    version: list[int]
    vin_v: list[float]
    vout_v: list[float]
    iout_a: list[float | None]
    ambient_c: list[float | None]
    current_a: list[list[float | None]]
    temp_c: list[list[float | None]]
    flags: list[list[int]]
    iin_a: list[float | None] = dataclasses.field(default_factory=list)  # input current


# --- status ------------------------------------------------------------------------------


@dataclass(frozen=True)
class Implausible(Model):
    """The plausibility rule a phase's newest reading broke, and the values as received."""

    rule: str
    current_a: float | None
    temp_c: float | None


@dataclass(frozen=True)
class DriftStatus(Model):
    """Cooling drift of one path (a phase's to the board, or the board's to ambient): the
    CUSUM statistic against its threshold (in innovation standard deviations), whether a
    ``thermal.drift`` episode is open, and the extra thermal resistance the readings imply
    (K/W, with standard errors) over the window since ``since_s`` and over recent samples."""

    raised: bool
    statistic: float
    threshold: float
    extra_k_per_w: float | None
    extra_se_k_per_w: float | None
    since_s: float | None
    recent_k_per_w: float | None = None
    recent_se_k_per_w: float | None = None


@dataclass(frozen=True)
class DriftEvent(Model):
    """The details of a ``thermal.drift`` event (see :attr:`Event.drift`)."""

    channel: str  # "phase" or "board"
    cleared: bool
    statistic: float | None
    threshold: float
    extra_k_per_w: float | None
    extra_se_k_per_w: float | None
    since_t_s: float | None
    samples: int
    recent_k_per_w: float | None = None
    recent_se_k_per_w: float | None = None


@dataclass(frozen=True)
class PhaseStatus(Model):
    index: int
    condition: str
    current_a: float | None
    temp_c: float | None
    share: float
    rated_current_a: float
    junction_limit_c: float
    flags: list[str]
    reading: str = "fresh"  # fresh, held (last good reading) or missing
    reading_age_s: float | None = None
    assumed_a: float | None = None  # current the load assumed for this phase
    implausible: Implausible | None = None
    # The share from the learned sharing, and from the definition (capacity uses ``share``).
    share_learned: float | None = None
    share_declared: float | None = None
    drift: DriftStatus | None = None  # cooling drift of the phase's path to the board


@dataclass(frozen=True)
class LastSample(Model):
    seq: int
    time_s: float
    age_s: float  # negative: dated ahead of the server's clock (within its allowed skew)
    vin_v: float
    vout_v: float
    ambient_c: float
    ahead_of_clock: bool = False


@dataclass(frozen=True)
class CapacityStatus(Model):
    """``binding``: ``rating``, ``trip_current``, ``warning_line`` or ``none``."""

    capacity_a: float
    binding_phase: int | None
    binding: str
    headroom_a: float
    headroom_rated_a: float
    counted_phases: list[int] = field(default_factory=list)


@dataclass(frozen=True)
class ThermalStatus(Model):
    hottest_phase: int | None
    hottest_temp_c: float | None
    margin_to_limit_k: float | None
    margin_to_warning_k: float | None
    steady_junction_c: list[float | None]
    time_to_warning_s: float | None
    warning_phase: int | None
    runaway: bool
    estimated_junction_c: list[float]
    junction_std_k: list[float]
    board_c: float
    board_drift: DriftStatus | None = None  # cooling drift of the board's path to ambient


@dataclass(frozen=True)
class ScreeningCase(Model):
    lose_phases: list[int]
    capacity_a: float
    headroom_a: float
    binding_phase: int | None
    binding: str
    steady_hottest_c: float | None
    runaway: bool
    time_to_warning_s: float | None
    warning_phase: int | None
    overloads: bool
    cascade: list[CascadeStep] = field(default_factory=list)  # screening only
    down_at_s: float | None = None


@dataclass(frozen=True)
class ScreeningSummary(Model):
    n1_secure: bool
    weakest: list[ScreeningCase]


@dataclass(frozen=True)
class RailStatus(Model):
    """What the rail can still do: condition (``nominal``, ``exposed``, ``degraded``,
    ``overloaded``, ``down``; None before the first sample), capacity, thermal margin."""

    rail_id: str
    version: int
    condition: str | None
    rated_load_a: float
    last_sample: LastSample | None
    capacity: CapacityStatus | None
    thermal: ThermalStatus | None
    screening: ScreeningSummary | None
    phases: list[PhaseStatus]
    caution: str
    state_version: int | None = None
    load_a: float | None = None
    load_assumed_a: float | None = None
    stale_phases: list[int] = field(default_factory=list)
    silent_phases: list[int] = field(default_factory=list)
    suspect_phases: list[int] = field(default_factory=list)


# --- events ------------------------------------------------------------------------------


@dataclass(frozen=True)
class Event(Model):
    id: int
    rail_id: str
    version: int
    time: str
    time_s: float
    kind: str
    severity: str
    phase: int | None
    message: str
    details: dict[str, Any]
    acked_by: str | None
    ack_note: str | None
    acked_at: str | None
    acked_key: str | None = None  # the name of the access key that acknowledged

    @property
    def cleared(self) -> bool:
        """A watch clearing (same kind as the one it clears, severity info)."""
        return self.details.get("cleared") is True

    @property
    def drift(self) -> DriftEvent | None:
        """The typed details of a ``thermal.drift`` event (None for other kinds)."""
        if self.kind != "thermal.drift":
            return None
        return DriftEvent.from_json(self.details, path=f"Event {self.id}.details")


@dataclass(frozen=True)
class EventPage(Model):
    """One page of events, newest first; pass ``next_cursor`` for the next (older) page."""

    items: list[Event]
    next_cursor: str | None


# --- analyses ----------------------------------------------------------------------------


@dataclass(frozen=True)
class Screening(Model):
    rail_id: str
    version: int
    depth: int
    load_a: float
    secure: bool
    overloading: list[list[int]]
    cases: list[ScreeningCase]
    caution: str


@dataclass(frozen=True)
class Peak(Model):
    time_s: float
    phase: int
    temp_c: float


@dataclass(frozen=True)
class CascadeStep(Model):
    """A phase leaving the rail in a forecast: ``cause`` is ``requested``, ``trip_current`` or
    ``junction_limit``."""

    at_s: float
    phase: int
    cause: str
    current_a: float | None


@dataclass(frozen=True)
class Stretch(Model):
    """A stretch of a forecast with constant load and constant set of carrying phases."""

    from_s: float
    to_s: float
    load_a: float
    active_phases: list[int]
    current_a: list[float]
    above_rating: list[int]
    above_trip: list[int]
    peak_c: float | None
    peak_phase: int


@dataclass(frozen=True)
class Forecast(Model):
    """``verdict``: ``holds``, ``overloaded`` or ``down`` (from ``verdict_at_s``)."""

    rail_id: str
    version: int
    start_s: float | None
    verdict: str
    verdict_at_s: float | None
    verdict_cause: str | None
    time_s: list[float]
    junction_c: list[list[float]]
    board_c: list[float]
    load_a: list[float]
    peak: Peak | None
    time_to_warning_s: float | None
    warning_phase: int | None
    time_to_limit_s: float | None
    limit_phase: int | None
    steady_junction_c: list[float] | None
    margin_to_warning_k: float | None
    margin_to_limit_k: float | None
    runaway: bool
    cascade: list[CascadeStep]
    stretches: list[Stretch]
    caution: str


@dataclass(frozen=True)
class Rating(Model):
    """The highest constant load for ``duration_s`` (None: indefinitely); ``binding`` is
    ``rating``, ``trip_current``, ``warning_line`` or ``none``."""

    duration_s: float | None
    rating_a: float
    headroom_a: float
    binding: str
    binding_phase: int | None


@dataclass(frozen=True)
class RatingCase(Model):
    lose_phases: list[int]
    ratings: list[Rating]


@dataclass(frozen=True)
class Ratings(Model):
    """Time-limited ratings: the rail as it is (``cases[0]``) and after each further loss."""

    rail_id: str
    version: int
    start_s: float | None
    load_a: float
    durations_s: list[float | None]
    cases: list[RatingCase]
    caution: str


@dataclass(frozen=True)
class MissionCase(Model):
    phases_needed: int
    survival_probability: float
    failure_probability: float
    mttf_h: float | None
    runaway: bool
    junction_c: list[float | None]
    fit: list[float | None]


@dataclass(frozen=True)
class LossMissionCase(MissionCase):
    lose_phase: int


@dataclass(frozen=True)
class Reliability(Model):
    rail_id: str
    version: int
    hours: float
    rated_load_a: float
    fit_at_ref: float
    ref_c: float
    activation_ev: float
    present: MissionCase
    n_minus_1: list[LossMissionCase]
    caution: str


@dataclass(frozen=True)
class BreakerCheck(Model):
    delay_s: float
    peak_junction_c: float
    rise_k: float
    margin_k: float
    soa_allowed_a: float | None
    soa_margin_a: float | None
    passes: bool
    binding: str
    within_soa_data: bool


@dataclass(frozen=True)
class BreakerStress(Model):
    power_w: float
    at_delay: BreakerCheck
    longest_safe_delay_s: float
    curve: list[BreakerCheck]
    caution: str
