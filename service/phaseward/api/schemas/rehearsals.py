"""Rehearsal requests and answers (formats: README, "Rehearsal and calibration formats")."""

from __future__ import annotations

from collections.abc import Callable
from typing import Annotated, Any, Literal, Self

from pydantic import BaseModel, BeforeValidator, Field, model_validator

from phaseward.api.schemas.common import MAX_ROW_ID, Contract
from phaseward.monitor.rehearsals import DEFAULT_HOLD_S

MAX_SWEEP = 10_000


def _values(minimum: float | None) -> Callable[[Any], Any]:
    """A setting is a number or a non-empty list of numbers to sweep; the message names the
    cause (one error, not one per branch of the union)."""

    def check(value: Any) -> Any:
        if value is None:
            return value
        values = value if isinstance(value, list) else [value]
        if not values or len(values) > MAX_SWEEP:
            raise ValueError(f"give a number or a list of 1 to {MAX_SWEEP} numbers to sweep")
        for x in values:
            if isinstance(x, bool) or not isinstance(x, int | float):
                raise ValueError(f"{x!r} is not a number: give a number or a list of numbers")
            if minimum is not None and x < minimum:
                raise ValueError(f"{x} is below {minimum:g}: this setting must be >= {minimum:g}")
        return value

    return check


_Sweep = float | list[float] | None
Level = Annotated[_Sweep, BeforeValidator(_values(None))]
NonNegative = Annotated[_Sweep, BeforeValidator(_values(0.0))]


class StoredTrace(Contract):
    trace_id: Annotated[int, Field(ge=1, le=MAX_ROW_ID, description="an uploaded trace's id")]


class RailWindow(Contract):
    rail_id: Annotated[str, Field(max_length=64, description="a rail's stored samples")]
    since: Annotated[float, Field(ge=0, description="epoch seconds, inclusive")]
    until: Annotated[float, Field(gt=0, description="epoch seconds, exclusive")]


def _s(text: str) -> Any:
    return Field(default=None, description=text)


class ProtectionSettingsIn(Contract):
    """Candidate protection settings; give a list for any of them to sweep it (the grid is
    every combination). A rule whose level is left out is off. A release level sets the
    rule's hysteresis: a tripped rule re-arms only once its reading reaches the release level
    (left out: as soon as the condition clears). Debounce: how long the condition must hold
    before the rule trips."""

    oc_level_a: Level = _s("over-current level per phase, A")
    oc_debounce_s: NonNegative = _s("over-current debounce, s")
    oc_release_a: Level = _s("over-current release level, A (below the level)")
    ot_level_c: Level = _s("over-temperature level, degC")
    ot_debounce_s: NonNegative = _s("over-temperature debounce, s")
    ot_release_c: Level = _s("over-temperature release level, degC (below the level)")
    imbalance_pct: Level = _s("sharing imbalance level: deviation from an equal share, %")
    imbalance_debounce_s: NonNegative = _s("imbalance debounce, s")
    imbalance_release_pct: Level = _s("imbalance release level, % (below the level)")
    imbalance_min_load_a: NonNegative = _s("imbalance watched only above this rail load, A")
    dead_floor_a: Level = _s("dead phase: a present phase reading below this, A")
    dead_debounce_s: NonNegative = _s(
        "dead phase debounce: how long a phase must read below dead_floor_a before it counts "
        "as dead, s (formerly dead_time_s)"
    )
    dead_release_a: Level = _s("dead phase release level, A (above the floor)")
    dead_others_min_a: Level = _s("dead phase watched only while the other phases average more, A")
    uv_level_v: Level = _s("input under-voltage level, V")
    uv_debounce_s: NonNegative = _s("under-voltage debounce, s")
    uv_release_v: Level = _s("under-voltage release level, V (above the level)")
    blanking_s: NonNegative = _s("blank over-current, imbalance and dead phase this long after "
                                 "a load step, s")  # fmt: skip
    step_a: NonNegative = _s("a load step: rail current changing by more than this, A")


class FaultLabel(Contract):
    """A labelled fault: the window in which a rule should trip."""

    start_s: float = Field(description="window start, s, on the trace's clock")
    end_s: float = Field(description="window end, s, inclusive")
    phase: Annotated[int, Field(ge=-1, le=63, description="the faulty phase; -1: the rail (input)")]
    kind: Annotated[
        str,
        Field(
            min_length=1, max_length=40,
            description="'any' (a trip of any rule detects it) or the rule that should: "
            "over_current, over_temperature, imbalance, dead_phase (per phase), under_voltage "
            "(phase -1)",
        ),
    ]  # fmt: skip

    @model_validator(mode="after")
    def _ordered(self) -> Self:
        if self.end_s < self.start_s:
            raise ValueError("end_s must not be before start_s")
        return self


class MissingPolicy(Contract):
    """What a missing temperature or input-voltage reading means to the rules."""

    policy: Literal["hold", "clear"] = Field(
        default="hold",
        description="hold: the last reading stands for up to hold_s (as firmware acts on the "
        "last value it read); clear: a missing reading clears the condition",
    )
    hold_s: Annotated[float, Field(ge=0, le=86_400, description="longest hold, s")] = DEFAULT_HOLD_S


class RehearsalIn(Contract):
    trace: StoredTrace | RailWindow
    settings: ProtectionSettingsIn
    labels: list[FaultLabel] = Field(default_factory=list, max_length=1000)
    missing: MissingPolicy = Field(default_factory=MissingPolicy)


class RehearsalOut(BaseModel):
    id: int
    status: Literal["queued", "running", "done", "failed"]
    percent: float
    error: str | None
    result: dict[str, Any] | None = Field(
        description="rows (one per combination: settings, trips, false trips, missed labels, "
        "mean_latency_s, max_latency_s = the worst latency, null when a label is missed, i.e. "
        "a miss counts as infinitely late); pareto (row indices on the front of false trips "
        "against worst latency); pareto_groups (the front with tied rows grouped); trips (a "
        "single combination's trips)"
    )


class ExportOut(BaseModel):
    """One row of a rehearsal as settings for firmware; post ``settings`` and ``missing`` with
    the same trace and labels to rehearse them again."""

    rehearsal_id: int = Field(description="the rehearsal the row comes from")
    row: int = Field(description="the row (combination) exported")
    exported: str = Field(description="UTC time of the export, RFC 3339")
    trace: dict[str, Any] = Field(description="trace_id and name, or rail_id, since, until")
    labels: list[dict[str, Any]] = Field(description="the fault labels it was scored against")
    missing: dict[str, Any] = Field(description="the missing-reading policy rehearsed")
    settings: dict[str, float | None] = Field(description="every setting; null = off / none")
    figures: dict[str, Any] = Field(description="what the row scored in the rehearsal")
