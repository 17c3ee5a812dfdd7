"""What a rail can still do, as operators read it."""

from __future__ import annotations

from pydantic import BaseModel, Field

from phaseward.api.schemas.analyses import ScreeningCase
from phaseward.api.schemas.common import CAUTION


class Implausible(BaseModel):
    rule: str
    current_a: float | None = Field(description="as received")
    temp_c: float | None = Field(description="as received")


class DriftStatus(BaseModel):
    """Cooling drift of one path (a phase's to the board, or the board's to ambient): Page's
    CUSUM on the estimator's normalised innovations (README, "Cooling drift")."""

    raised: bool = Field(description="a thermal.drift episode is open")
    statistic: float = Field(
        description="the CUSUM statistic, in innovation standard deviations: the upper one "
        "(raise at threshold) while no episode is open, the clearing one while it is"
    )
    threshold: float = Field(description="the rail's monitor.drift_threshold (h)")
    extra_k_per_w: float | None = Field(
        description="extra thermal resistance the readings imply over the window, K/W"
    )
    extra_se_k_per_w: float | None = Field(description="its standard error, K/W")
    recent_k_per_w: float | None = Field(
        description="the same with older samples of the window discounted (a memory of about "
        "600 samples): the present value while the resistance still rises, K/W"
    )
    recent_se_k_per_w: float | None = Field(description="its standard error, K/W")
    since_s: float | None = Field(
        description="time of the window's first sample: where the statistic last stood at "
        "zero, the estimated start of the shift (null: no window)"
    )


class PhaseStatus(BaseModel):
    index: int
    condition: str = Field(description="active, isolated, suspect or silent")
    current_a: float | None
    temp_c: float | None
    share: float = Field(
        description="fraction of the rail current this phase carries, as capacity takes it"
    )
    share_learned: float = Field(
        description="the same from the learned sharing; capacity follows it only once it "
        "differs significantly (see the README, declared current sharing)"
    )
    share_declared: float = Field(description="the same from the definition's share_target")
    rated_current_a: float
    junction_limit_c: float
    flags: list[str]
    reading: str = Field(
        default="fresh",
        description="where current_a comes from: fresh (this sample), held (the last good "
        "reading, within the rail's monitor.stale_s), missing",
    )
    reading_age_s: float | None = Field(default=None, description="age of the reading in use")
    assumed_a: float | None = Field(
        default=None, description="current the load assumed for this phase (no reading in use)"
    )
    implausible: Implausible | None = Field(
        default=None, description="the newest reading broke a plausibility rule (suspect)"
    )
    drift: DriftStatus | None = Field(
        default=None, description="cooling drift of the phase's path to the board"
    )


class LastSample(BaseModel):
    seq: int
    time_s: float
    age_s: float = Field(
        description="seconds since the sample by this server's clock; negative when the "
        "sample is dated ahead of it (at most the allowed skew, PHASEWARD_FUTURE_SKEW_S)"
    )
    ahead_of_clock: bool = Field(
        default=False, description="the sample is dated ahead of this server's clock"
    )
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
    counted_phases: list[int] = Field(
        default_factory=list,
        description="the active phases the capacity counts (not isolated, suspect or silent)",
    )


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
    board_drift: DriftStatus | None = Field(
        default=None, description="cooling drift of the board's path to ambient"
    )


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
    load_assumed_a: float | None = Field(
        default=None,
        description="part of load_a assumed for phases without a reading (each at the mean "
        "of the phases with one); null: all measured",
    )
    stale_phases: list[int] = Field(default_factory=list, description="on a held reading")
    silent_phases: list[int] = Field(default_factory=list)
    suspect_phases: list[int] = Field(
        default_factory=list, description="an implausible reading: not vouched for"
    )
    last_sample: LastSample | None
    capacity: CapacityStatus | None
    thermal: ThermalStatus | None
    screening: Screening | None
    ripple: RippleStatus | None
    phases: list[PhaseStatus]
    caution: str = CAUTION
