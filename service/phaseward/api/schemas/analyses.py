"""Degraded-mode analyses: screening, forecast."""

from __future__ import annotations

from itertools import pairwise
from typing import Annotated, Literal, Self

from pydantic import BaseModel, Field, model_validator

from phaseward.api.schemas.common import CAUTION, Celsius, Contract, NonNegative, Seconds
from phaseward.api.schemas.rails import FosterStage as FosterStageIn

MAX_HORIZON_S = 24 * 3600.0


class CascadeStep(BaseModel):
    at_s: float
    phase: int
    cause: Literal["requested", "trip_current", "junction_limit"] = Field(
        description="requested drop; its current above its trip current; its junction at its "
        "limit (over-temperature shutdown)"
    )
    current_a: float | None = Field(description="the phase's current when it tripped")


class ScreeningCase(BaseModel):
    lose_phases: list[int]
    capacity_a: float
    headroom_a: float = Field(description="capacity minus the present load")
    binding_phase: int | None
    binding: str = Field(description="rating, trip_current, warning_line or none")
    steady_hottest_c: float | None = Field(description="None: no steady state (runaway)")
    runaway: bool
    time_to_warning_s: float | None = Field(
        description="first time a junction reaches its warning line; None: not within the "
        "forecast horizon"
    )
    warning_phase: int | None
    overloads: bool
    cascade: list[CascadeStep] = Field(
        default_factory=list,
        description="what the loss sets off at the present load within the forecast horizon: "
        "trips on current at once, shutdowns at the junction limit later (screening only)",
    )
    down_at_s: float | None = Field(
        default=None, description="when the cascade leaves no phase (None: the rail holds)"
    )


class ScreeningOut(BaseModel):
    rail_id: str
    version: int
    depth: int
    load_a: float
    secure: bool = Field(description="no case overloads the rail")
    overloading: list[list[int]] = Field(description="the losses that would overload the rail")
    cases: list[ScreeningCase] = Field(description="weakest first")
    caution: str = CAUTION


class Rating(BaseModel):
    duration_s: float | None = Field(description="None: indefinitely (steady state included)")
    rating_a: float = Field(
        description="highest constant rail current for the duration with no junction past its "
        "warning line and no phase past its current rating or trip current"
    )
    headroom_a: float = Field(description="rating minus the present load")
    binding: Literal["rating", "trip_current", "warning_line", "none"] = Field(
        description="what binds: a phase's current rating or trip current, or a junction's "
        "warning line (limit minus margin); none: no phase left"
    )
    binding_phase: int | None


class RatingCase(BaseModel):
    lose_phases: list[int] = Field(description="further losses now; empty: the rail as it is")
    ratings: list[Rating] = Field(description="one per duration, in the order of durations_s")


class RatingsOut(BaseModel):
    rail_id: str
    version: int
    start_s: float | None = Field(description="time of the state the ratings start from")
    load_a: float = Field(description="the present load")
    durations_s: list[float | None] = Field(description="ascending; None: indefinitely")
    cases: list[RatingCase] = Field(description="the rail as it is first, then each loss")
    caution: str = CAUTION


class LoadPoint(Contract):
    at_s: NonNegative
    current_a: NonNegative


class LoadProfile(Contract):
    """Exactly one of: a constant, steps (each value holds until the next), or points
    (linear in between); before the first and after the last point the end value holds."""

    constant_a: NonNegative | None = None
    steps: list[LoadPoint] | None = Field(default=None, min_length=1, max_length=10_000)
    points: list[LoadPoint] | None = Field(default=None, min_length=1, max_length=10_000)

    @model_validator(mode="after")
    def _one_shape(self) -> Self:
        given = [x is not None for x in (self.constant_a, self.steps, self.points)]
        if sum(given) != 1:
            raise ValueError("give exactly one of constant_a, steps or points")
        for name in ("steps", "points"):
            rows = getattr(self, name)
            if rows and any(b.at_s <= a.at_s for a, b in pairwise(rows)):
                raise ValueError(f"{name} must be in increasing at_s")
        return self


class PhaseDrop(Contract):
    phase: Annotated[int, Field(ge=0, le=63)]
    at_s: NonNegative = 0.0


class ForecastIn(Contract):
    load: LoadProfile | None = Field(default=None, description="default: the present load")
    drop: list[PhaseDrop] = Field(default_factory=list, max_length=64)
    horizon_s: Annotated[float, Field(gt=0, le=MAX_HORIZON_S)] = 3600.0
    points: Annotated[int, Field(ge=10, le=20_000)] = Field(
        default=500,
        description="trajectory rows (about): evenly spaced, plus the peak, crossings and "
        "stretch edges; the computation itself is exact and does not depend on it",
    )
    ambient_c: Celsius | None = None


class Peak(BaseModel):
    time_s: float
    phase: int
    temp_c: float


class Stretch(BaseModel):
    from_s: float
    to_s: float
    load_a: float = Field(description="held over the stretch (a ramp: its higher end)")
    active_phases: list[int]
    current_a: list[float] = Field(description="per phase")
    above_rating: list[int] = Field(description="phases above their current rating")
    above_trip: list[int] = Field(description="phases that tripped on current at its start")
    peak_c: float | None
    peak_phase: int


class ForecastOut(BaseModel):
    rail_id: str
    version: int
    start_s: float | None = Field(description="time of the state the forecast starts from")
    verdict: Literal["holds", "overloaded", "down"] = Field(
        description="down: no phase left to carry the load; overloaded: a phase above its "
        "rating, a trip, or a junction at its warning line"
    )
    verdict_at_s: float | None
    verdict_cause: str | None
    time_s: list[float]
    junction_c: list[list[float]] = Field(description="per row, one value per phase")
    board_c: list[float]
    load_a: list[float]
    peak: Peak | None
    time_to_warning_s: float | None = Field(
        description="first time a carrying phase's junction reaches its warning line (limit "
        "minus margin)"
    )
    warning_phase: int | None
    time_to_limit_s: float | None = Field(
        description="first time a carrying phase's junction reaches its limit (it then drops)"
    )
    limit_phase: int | None
    steady_junction_c: list[float] | None
    margin_to_warning_k: float | None = Field(
        description="smallest distance below a warning line over the horizon (negative: past)"
    )
    margin_to_limit_k: float | None = Field(
        description="smallest distance below a junction limit over the horizon"
    )
    runaway: bool
    cascade: list[CascadeStep]
    stretches: list[Stretch]
    caution: str = CAUTION


class MissionCase(BaseModel):
    phases_needed: int = Field(description="fewest survivors that carry the rated load")
    survival_probability: float
    failure_probability: float
    mttf_h: float | None = Field(description="mean time to failure; None: unbounded")
    runaway: bool
    junction_c: list[float | None] = Field(description="at the rated load; None: phase out")
    fit: list[float | None] = Field(description="accelerated failure rate per phase, FIT")


class LossMissionCase(MissionCase):
    lose_phase: int


class ReliabilityOut(BaseModel):
    rail_id: str
    version: int
    hours: float
    rated_load_a: float
    fit_at_ref: float
    ref_c: float
    activation_ev: float
    present: MissionCase
    n_minus_1: list[LossMissionCase]
    caution: str = CAUTION


class SoaPoint(Contract):
    time_s: Seconds
    current_a: Annotated[float, Field(gt=0, le=1e6)]


class BreakerIn(Contract):
    """The hot-swap pass MOSFET of one phase while it limits a downstream short."""

    vin_v: Annotated[float, Field(gt=0, le=1000)]
    current_limit_a: Annotated[float, Field(gt=0, le=10_000)]
    delay_s: Annotated[float, Field(ge=1e-9, le=100)]
    foster: list[FosterStageIn] = Field(min_length=1, max_length=8)
    start_temp_c: Celsius = 25.0
    junction_limit_c: Celsius = 150.0
    soa: list[SoaPoint] = Field(min_length=1, max_length=64, description="at vin_v")
    curve_points: Annotated[int, Field(ge=2, le=1000)] = 50


class BreakerCheck(BaseModel):
    delay_s: float
    peak_junction_c: float
    rise_k: float
    margin_k: float
    soa_allowed_a: float | None
    soa_margin_a: float | None
    passes: bool
    binding: str
    within_soa_data: bool


class BreakerOut(BaseModel):
    power_w: float
    at_delay: BreakerCheck
    longest_safe_delay_s: float = Field(
        description="longest delay passing both checks (at most the last SOA point)"
    )
    curve: list[BreakerCheck]
    caution: str = CAUTION


class CurveIn(Contract):
    """A recorded heating curve (power stepped on at t = 0 from equilibrium) or cooling curve
    (power stepped off) with its power step; format: README, "Rehearsal and calibration
    formats"."""

    t_s: list[float] = Field(
        min_length=8, max_length=200_000,
        description="time since the power step, in time_unit (seconds by default), >= 0, "
        "strictly increasing",
    )  # fmt: skip
    temp_c: list[float] = Field(
        min_length=8, max_length=200_000, description="temperature at each time, degC"
    )
    power_w: Annotated[float, Field(gt=0, description="the power step, W")]
    cooling: bool = Field(default=False, description="true: the curve follows power removal")
    orders: list[Annotated[int, Field(ge=1, le=4)]] = Field(
        default=[1, 2, 3, 4], min_length=1,
        description="Foster stage counts to try; each needs 4 samples per fitted parameter",
    )  # fmt: skip
    reference_temp_c: Celsius | None = Field(
        default=None,
        description="temperature before a heating step (after a cooling one), degC; left out: "
        "fitted. When given it is checked against a free fit (reference_offset_k).",
    )
    location: Literal["junction", "sensor"] = Field(
        default="junction", description="where the temperature was measured"
    )
    time_unit: Literal["s", "ms", "us"] = Field(default="s", description="the unit of t_s")

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        if len(self.t_s) != len(self.temp_c):
            raise ValueError("t_s and temp_c must have the same length")
        return self


class CalibrationIn(Contract):
    """A recorded heating curve (power stepped on at t = 0 from equilibrium) or cooling curve
    (power stepped off), with the step given as power or as the phase current."""

    t_s: list[float] = Field(
        min_length=8, max_length=200_000,
        description="time since the power step, in time_unit (seconds by default)",
    )  # fmt: skip
    temp_c: list[float] = Field(min_length=8, max_length=200_000, description="degC")
    power_w: Annotated[float, Field(gt=0)] | None = Field(default=None, description="W")
    current_a: Annotated[float, Field(gt=0)] | None = Field(
        default=None, description="phase current during the step, A (power from the loss model)"
    )
    phase: Annotated[int, Field(ge=0, le=63)] = 0
    cooling: bool = False
    orders: list[Annotated[int, Field(ge=1, le=4)]] = Field(default=[1, 2, 3, 4], min_length=1)
    reference_temp_c: Celsius | None = None
    location: Literal["junction", "sensor"] = "junction"
    time_unit: Literal["s", "ms", "us"] = Field(default="s", description="the unit of t_s")
    apply: Literal["no", "phase", "all"] = Field(
        default="no",
        description="store the fit as a new rail version: for `phase`, or all (refused when "
        "the curve is not settled)",
    )

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        if len(self.t_s) != len(self.temp_c):
            raise ValueError("t_s and temp_c must have the same length")
        if (self.power_w is None) == (self.current_a is None):
            raise ValueError("give exactly one of power_w or current_a")
        return self


class FittedStage(BaseModel):
    r_k_per_w: float
    tau_s: float
    r_ci_k_per_w: list[float | None] = Field(
        description="95 % interval, asymptotic Wald in log space (never below zero)"
    )
    tau_ci_s: list[float | None] = Field(description="95 % interval, Wald in log space")


class OrderFitOut(BaseModel):
    order: int
    stages: list[FittedStage]
    reference_temp_c: float
    total_r_k_per_w: float = Field(description="total thermal resistance, sum of R_i, K/W")
    total_r_ci_k_per_w: list[float | None] = Field(description="95 % interval, log space")
    settled: bool = Field(description="the curve lasts 3 slowest time constants")
    rms_k: float
    bic: float
    ci_valid: bool
    converged: bool


class CurveFitOut(BaseModel):
    order: int = Field(description="the order the criterion chose")
    criterion: str
    power_w: float
    location: str
    cooling: bool
    note: str
    chosen: OrderFitOut
    fits: list[OrderFitOut]
    skipped_orders: list[int] = Field(description="orders with too few samples per parameter")
    settled: bool = Field(description="the chosen fit's verdict; see settled_rule")
    settled_rule: str
    warnings: list[str] = Field(description="doubts about the curve or the fit, plain text")
    reference_offset_k: float | None = Field(
        description="with reference_temp_c given: a free fit's T_ref minus it, K"
    )
    reference_offset_ci_k: list[float | None]
    applied_version: int | None


class CalibrationOut(CurveFitOut):
    rail_id: str
