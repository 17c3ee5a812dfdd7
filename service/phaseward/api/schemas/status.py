"""What a rail can still do, as operators read it."""

from __future__ import annotations

from pydantic import BaseModel, Field

from phaseward.api.schemas.analyses import ScreeningCase
from phaseward.api.schemas.common import CAUTION


class PhaseStatus(BaseModel):
    index: int
    condition: str = Field(description="active, isolated, suspect or silent")
    current_a: float | None
    temp_c: float | None
    share: float = Field(description="fraction of the rail current this phase carries")
    rated_current_a: float
    junction_limit_c: float
    flags: list[str]


class LastSample(BaseModel):
    seq: int
    time_s: float
    age_s: float
    vin_v: float
    vout_v: float
    ambient_c: float


class CapacityStatus(BaseModel):
    capacity_a: float = Field(
        description="largest total current the active phases carry in steady state"
    )
    binding_phase: int | None
    binding: str = Field(
        description="what binds the capacity: rating (a phase's current rating), trip_current "
        "(its trip current), warning_line (its junction's warning line in steady state), none"
    )
    headroom_a: float = Field(description="capacity minus the present load")
    headroom_rated_a: float = Field(description="capacity minus the load the rail must deliver")


class ThermalStatus(BaseModel):
    hottest_phase: int | None
    hottest_temp_c: float | None
    margin_to_limit_k: float | None = Field(
        description="junction limit minus the hottest estimated junction temperature"
    )
    margin_to_warning_k: float | None = Field(
        description="that phase's warning line (limit minus margin) minus its estimate"
    )
    steady_junction_c: list[float | None] = Field(description="steady state at the present load")
    time_to_warning_s: float | None = Field(
        description="first time a junction reaches its warning line at the present load; None: "
        "not within the horizon"
    )
    warning_phase: int | None
    runaway: bool
    estimated_junction_c: list[float] = Field(
        description="junction temperatures estimated from the model and the sensors (Kalman)"
    )
    junction_std_k: list[float] = Field(description="one standard deviation of each estimate")
    board_c: float = Field(description="estimated temperature of the shared board node")


class Screening(BaseModel):
    n1_secure: bool = Field(description="any single further loss leaves capacity for the load")
    weakest: list[ScreeningCase] = Field(description="the three weakest single losses")


class RippleStatus(BaseModel):
    """Peak-to-peak output ripple: all phases, survivors where they sit, survivors re-spaced."""

    all_phases_pp_a: float | None
    survivors_pp_a: float | None
    respaced_pp_a: float | None
    all_phases_pp_v: float | None = None
    survivors_pp_v: float | None = None
    respaced_pp_v: float | None = None


class RailStatus(BaseModel):
    rail_id: str
    version: int
    state_version: int | None = None
    condition: str | None = Field(description="nominal, exposed, degraded, overloaded, down")
    rated_load_a: float
    load_a: float | None = None
    last_sample: LastSample | None
    capacity: CapacityStatus | None
    thermal: ThermalStatus | None
    screening: Screening | None
    ripple: RippleStatus | None
    phases: list[PhaseStatus]
    caution: str = CAUTION
