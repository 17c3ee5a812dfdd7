"""Rehearsal requests and answers."""

from __future__ import annotations

from typing import Annotated, Any, Literal, Self

from pydantic import BaseModel, Field, model_validator

from phaseward.api.schemas.common import MAX_ROW_ID, Contract

Setting = float | Annotated[list[float], Field(min_length=1, max_length=10_000)] | None


class StoredTrace(Contract):
    trace_id: Annotated[int, Field(ge=1, le=MAX_ROW_ID)]


class RailWindow(Contract):
    rail_id: Annotated[str, Field(max_length=64)]
    since: Annotated[float, Field(ge=0, description="epoch seconds, inclusive")]
    until: Annotated[float, Field(gt=0, description="epoch seconds, exclusive")]


class ProtectionSettingsIn(Contract):
    """Candidate protection settings; give a list for any of them to sweep it (the grid is
    every combination). Levels left out disable their rule; see physics.rehearsal."""

    oc_level_a: Setting = None
    oc_debounce_s: Setting = None
    ot_level_c: Setting = None
    ot_debounce_s: Setting = None
    imbalance_pct: Setting = None
    imbalance_debounce_s: Setting = None
    imbalance_min_load_a: Setting = None
    dead_floor_a: Setting = None
    dead_debounce_s: Setting = None
    dead_others_min_a: Setting = None
    uv_level_v: Setting = None
    uv_debounce_s: Setting = None
    blanking_s: Setting = None
    step_a: Setting = None


class FaultLabel(Contract):
    start_s: float
    end_s: float
    phase: Annotated[int, Field(ge=-1, le=63, description="-1: the rail (input)")]
    kind: Annotated[str, Field(min_length=1, max_length=40)]

    @model_validator(mode="after")
    def _ordered(self) -> Self:
        if self.end_s < self.start_s:
            raise ValueError("end_s must not be before start_s")
        return self


class RehearsalIn(Contract):
    trace: StoredTrace | RailWindow
    settings: ProtectionSettingsIn
    labels: list[FaultLabel] = Field(default_factory=list, max_length=1000)


class RehearsalOut(BaseModel):
    id: int
    status: Literal["queued", "running", "done", "failed"]
    percent: float
    error: str | None
    result: dict[str, Any] | None = Field(
        description="rows (one per combination), pareto (row indices), trips (one combination)"
    )
