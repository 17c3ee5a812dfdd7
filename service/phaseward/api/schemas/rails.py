"""Rail definitions: what the converter is, so that physics can judge what it may still do."""

from __future__ import annotations

from typing import Annotated, Any, Literal, Self

from pydantic import Field, ValidationInfo, field_validator, model_validator

from phaseward.api.schemas.common import Contract, KelvinPerWatt, Seconds

FeatureName = Literal[
    "input_surge_ratio",
    "vin_dip_pct",
    "phase_rise_ratio",
    "phase_reversal_ratio",
    "phase_remaining_ratio",
    "phase_drop_ratio",
    "drive_activity",
]  # fmt: skip; the features of physics.signatures (a test keeps them equal)
Slug = Annotated[str, Field(pattern=r"^[a-z0-9][a-z0-9-]{0,63}$", max_length=64)]

# Physical ranges of definition fields. Each is far wider than any real part (so no real
# rail is refused) and narrow enough that every product, square and ratio the physics forms
# of them stays finite in float64 (a load of 2.7e307 A overflowed the loss model).
Volts = Annotated[float, Field(ge=1e-3, le=1e4)]  # a buck converter's input or output
Amps = Annotated[float, Field(ge=1e-3, le=1e5)]  # a rail's load, a phase's rating or trip
PhaseAmps = Annotated[float, Field(ge=0, le=1e5)]  # a point of a loss table
Hertz = Annotated[float, Field(ge=1e3, le=1e8)]  # switching frequency
Henry = Annotated[float, Field(ge=1e-10, le=1.0)]
Ohms = Annotated[float, Field(ge=1e-7, le=10.0)]  # a winding or switch resistance
Watts = Annotated[float, Field(ge=0, le=1e5)]  # a fixed loss, a loss-table point
DefCelsius = Annotated[float, Field(ge=-100, le=500)]  # ambient, limits, reference points
Kelvin = Annotated[float, Field(ge=0, le=500)]  # a margin or hysteresis
Instant = Annotated[float, Field(ge=0, le=1e-3)]  # switching edges and dead time
Duration = Annotated[float, Field(ge=1e-3, le=1e6)]  # gaps, horizons, lags (about 11 days)
ShareTarget = Annotated[
    float,
    Field(
        ge=0.01, le=100,
        description="the phase's declared share of the load relative to the others (only "
        "ratios matter; 1 for every phase is equal sharing): where sharing learning starts",
    ),
]  # fmt: skip
SenseGain = Annotated[
    float,
    Field(ge=0.1, le=10, description="current-sense calibration: amps = gain x reading + offset"),
]
SenseOffset = Annotated[float, Field(ge=-1e3, le=1e3, description="A, added after the gain")]


class InductorSpec(Contract):
    inductance_h: Henry
    dcr_ohm: Ohms
    dcr_ref_c: DefCelsius = 20.0


class PowerStageSpec(Contract):
    """Analytic switch losses (Erickson & Maksimovic); Rds(on) rises linearly with T."""

    rds_high_ohm: Ohms
    rds_low_ohm: Ohms
    rds_ref_c: DefCelsius = 25.0
    rds_tc_per_k: Annotated[float, Field(ge=0, le=0.05)] = 0.004  # typical Si MOSFET, from memory
    rise_time_s: Instant = 0.0
    fall_time_s: Instant = 0.0
    gate_charge_c: Annotated[float, Field(ge=0, le=1e-3)] = 0.0
    drive_v: Annotated[float, Field(ge=0, le=100)] = 5.0
    dead_time_s: Instant = 0.0
    diode_drop_v: Annotated[float, Field(ge=0, le=10)] = 0.7


class LossTableSpec(Contract):
    """Power-stage loss versus phase current from a datasheet curve at ``ref_c``."""

    current_a: list[PhaseAmps] = Field(min_length=2, max_length=64)
    loss_w: list[Watts] = Field(min_length=2, max_length=64)
    ref_c: DefCelsius = 25.0
    tc_per_k: Annotated[float, Field(ge=0, le=0.05)] = 0.0

    @model_validator(mode="after")
    def _same_length_increasing(self) -> Self:
        if len(self.current_a) != len(self.loss_w):
            raise ValueError("loss_w must have one value per current_a point")
        if any(b <= a for a, b in zip(self.current_a, self.current_a[1:], strict=False)):
            raise ValueError("current_a must be strictly increasing")
        return self


class FosterStage(Contract):
    r_k_per_w: KelvinPerWatt
    tau_s: Seconds


class PhaseSpec(Contract):
    rated_current_a: Amps
    overcurrent_limit_a: Amps
    junction_limit_c: DefCelsius
    warning_margin_k: Kelvin = 10.0
    inductor: InductorSpec
    power_stage: PowerStageSpec | None = None
    loss_table: LossTableSpec | None = None
    core_loss_w: Watts = 0.0
    thermal: list[FosterStage] = Field(min_length=1, max_length=6)
    share_target: ShareTarget = 1.0
    sense_gain: SenseGain = 1.0
    sense_offset_a: SenseOffset = 0.0

    @model_validator(mode="after")
    def _one_loss_model(self) -> Self:
        if (self.power_stage is None) == (self.loss_table is None):
            raise ValueError("give exactly one of power_stage or loss_table")
        return self


class PhaseOverride(Contract):
    """Per-phase exceptions: any top-level phase field given here replaces the default."""

    index: Annotated[int, Field(ge=0)]
    rated_current_a: Amps | None = None
    overcurrent_limit_a: Amps | None = None
    junction_limit_c: DefCelsius | None = None
    warning_margin_k: Kelvin | None = None
    inductor: InductorSpec | None = None
    power_stage: PowerStageSpec | None = None
    loss_table: LossTableSpec | None = None
    core_loss_w: Watts | None = None
    thermal: list[FosterStage] | None = Field(default=None, min_length=1, max_length=6)
    share_target: ShareTarget | None = None
    sense_gain: SenseGain | None = None
    sense_offset_a: SenseOffset | None = None


class BoardSpec(Contract):
    """The shared board node every phase's thermal chain ends on, and its path to ambient."""

    to_ambient_k_per_w: KelvinPerWatt
    capacitance_j_per_k: Annotated[float, Field(ge=1e-6, le=1e9)]


class MonitorSpec(Contract):
    """How telemetry is judged (not the hardware's protection, which stays in hardware)."""

    debounce_samples: Annotated[int, Field(ge=1, le=100)] = 3
    collapse_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.1
    imbalance_pct: Annotated[float, Field(gt=0, le=500)] = 25.0
    min_share_load_fraction: Annotated[float, Field(ge=0, lt=1)] = 0.2
    undervoltage_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.85
    excursion_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.05
    gap_s: Duration = 10.0
    forecast_horizon_s: Duration = 900.0
    hysteresis_k: Kelvin = 2.0
    # The junction estimator: how far to trust the loss model and the temperature sensors.
    process_noise_w: Annotated[float, Field(ge=1e-9, le=1e6)] = 0.2
    sensor_noise_k: Annotated[float, Field(ge=1e-6, le=1e3)] = 0.5
    sensor_tau_s: Duration | None = Field(
        default=None, description="first-order lag of the sensor behind the junction"
    )
    sensor_offset_k: float = Field(default=0.0, ge=-50, le=50)
    # Learned sharing: each informative sample moves a phase's learned share by this fraction
    # of its difference; capacity follows the learned shares only once they differ from the
    # shares it uses by more than share_significance standard errors (an EWMA chart).
    share_learning_rate: Annotated[float, Field(ge=1e-4, le=1)] = 0.2
    share_significance: Annotated[float, Field(ge=1, le=20)] = 5.0
    # Cooling drift: Page's CUSUM on the estimator's normalised innovations (README, "Cooling
    # drift"). k = 0.25 looks for a shift of half a standard deviation; h = 35 puts the
    # in-control run length near 6e8 samples per channel by Siegmund's approximation
    # (about 19 years at 1 Hz; bench/drift_false_alarms.py measures the rate).
    drift_reference: Annotated[float, Field(ge=0.05, le=5)] = Field(
        default=0.25,
        description="CUSUM reference value k, in standard deviations of the innovation: "
        "half the smallest persistent shift worth finding",
    )
    drift_threshold: Annotated[float, Field(ge=2, le=1000)] = Field(
        default=35.0,
        description="CUSUM decision interval h, in standard deviations: larger means rarer "
        "false alarms and later detection (35: about one false alarm in 19 years per phase "
        "at one sample per second)",
    )
    stale_s: Annotated[float, Field(gt=0, le=86400)] = Field(
        default=5.0,
        description="a phase not reported (or read implausibly) keeps its last good reading "
        "this long, then it is silent (or suspect)",
    )


class PlausibilitySpec(Contract):
    """What this rail's telemetry can plausibly read. A field left out (null) follows from the
    rest of the definition (defaults and each rule's basis: README, "Plausibility gate")."""

    current_factor: Annotated[float, Field(gt=1, le=100)] | None = Field(
        default=None, description="currents above this multiple of overcurrent_limit_a (3)"
    )
    reverse_band_a: Annotated[float, Field(ge=0, le=1e6)] | None = Field(
        default=None, description="backward current beyond this (10 % of rated_current_a)"
    )
    temp_min_c: DefCelsius | None = Field(default=None, description="(-55 degC)")
    temp_max_c: DefCelsius | None = Field(default=None, description="(junction limit + 50 K)")
    below_ambient_k: Annotated[float, Field(gt=0, le=200)] | None = Field(
        default=None, description="a sensor colder than ambient by more than this (15 K)"
    )
    temp_rate_k_per_s: Annotated[float, Field(gt=0, le=1e6)] | None = Field(
        default=None,
        description="fastest plausible change of a temperature reading (twice the "
        "junction's heating rate at the trip current and limit, from the thermal network)",
    )
    temp_step_k: Annotated[float, Field(ge=0, le=100)] | None = Field(
        default=None, description="change allowed on top of the rate, for noise (5 K)"
    )
    voltage_factor: Annotated[float, Field(gt=1, le=100)] | None = Field(
        default=None,
        description="vin above this multiple of vin_v, or vout above it times vin_v (2)",
    )


class ReliabilitySpec(Contract):
    """Per-phase failure rate at a reference temperature, accelerated per JEDEC JEP122."""

    fit_at_ref: float = Field(ge=1e-6, le=1e9, description="failures per 1e9 phase-hours at ref_c")
    ref_c: DefCelsius
    activation_ev: Annotated[float, Field(ge=0.01, le=3)] = 0.7  # a usual default, common practice


class OutputSpec(Contract):
    """The output capacitor bank, for the ripple voltage the interleaving leaves."""

    capacitance_f: Annotated[float, Field(ge=1e-12, le=100)]
    esr_ohm: Annotated[float, Field(ge=0, le=10)] = 0.0


Limits = Annotated[list[Annotated[float, Field(ge=0, le=1e6)]], Field(min_length=3, max_length=3)]


class FaultEvidenceSpec(Contract):
    """How captures around a trip are judged; every field is optional, the defaults and their
    basis are in ``physics/signatures.py`` (DEFAULT_LIMITS, EvidenceRules)."""

    limits: dict[FeatureName, Limits] = Field(
        default_factory=dict,
        description="per feature [quiet, edge, clear], quiet < edge < clear",
    )
    min_samples_per_period: Annotated[float, Field(ge=2, le=10_000)] | None = None
    min_baseline_periods: Annotated[float, Field(ge=1, le=10_000)] | None = None
    min_phase_share: Annotated[float, Field(ge=0, lt=1)] | None = None
    min_confidence: Annotated[float, Field(gt=0, le=1)] | None = None

    @field_validator("limits")
    @classmethod
    def _ordered(cls, limits: dict[str, list[float]]) -> dict[str, list[float]]:
        for name, (quiet, edge, clear) in limits.items():
            if not quiet < edge < clear:
                raise ValueError(f"limits of {name} must rise: quiet < edge < clear")
        return limits


class RailBody(Contract):
    """A rail definition as PUT takes it (the id comes from the path)."""

    name: Annotated[str, Field(min_length=1, max_length=200)]
    vin_v: Volts
    vout_v: Volts
    switching_hz: Hertz
    load_a: Amps
    ambient_c: DefCelsius = 25.0
    phase_count: Annotated[int, Field(ge=1, le=32)]
    phase: PhaseSpec
    overrides: list[PhaseOverride] = Field(default_factory=list, max_length=32)
    board: BoardSpec
    monitor: MonitorSpec = Field(default_factory=MonitorSpec)
    plausibility: PlausibilitySpec | None = None
    reliability: ReliabilitySpec | None = None
    output: OutputSpec | None = None
    fault_evidence: FaultEvidenceSpec | None = None
    vout_mode: Annotated[int, Field(ge=0, le=0x1F)] | None = Field(
        default=None, description="PMBus VOUT_MODE (linear mode) for READ_VOUT words"
    )

    @field_validator("vout_v")
    @classmethod
    def _step_down(cls, vout_v: float, info: ValidationInfo) -> float:
        vin_v = info.data.get("vin_v")
        if vin_v is not None and vout_v >= vin_v:
            raise ValueError(f"a step-down rail needs vout_v < vin_v ({vout_v} >= {vin_v})")
        return vout_v

    @field_validator("overrides")
    @classmethod
    def _override_indexes(
        cls, overrides: list[PhaseOverride], info: ValidationInfo
    ) -> list[PhaseOverride]:
        count = info.data.get("phase_count")
        seen: set[int] = set()
        for o in overrides:
            if o.index in seen:
                raise ValueError(f"phase index {o.index} is overridden twice")
            if count is not None and o.index >= count:
                raise ValueError(f"phase index {o.index} is out of range for {count} phases")
            seen.add(o.index)
        return overrides

    @field_validator("plausibility")
    @classmethod
    def _plausible_covers_the_limits(
        cls, p: PlausibilitySpec | None, info: ValidationInfo
    ) -> PlausibilitySpec | None:
        """A plausibility range narrower than the rail's own limits would hide a real
        overtemperature as a broken sensor: refused."""
        if p is None or p.temp_max_c is None:
            return p
        if p.temp_min_c is not None and p.temp_min_c >= p.temp_max_c:
            raise ValueError("temp_min_c must be below temp_max_c")
        phase: PhaseSpec | None = info.data.get("phase")
        overrides: list[PhaseOverride] = info.data.get("overrides", [])
        limits = [o.junction_limit_c for o in overrides if o.junction_limit_c is not None]
        if phase is not None:
            limits.append(phase.junction_limit_c)
        if limits and p.temp_max_c <= max(limits):
            raise ValueError(
                f"temp_max_c ({p.temp_max_c}) must be above every junction limit "
                f"({max(limits)}): a real overtemperature must never read as implausible"
            )
        return p

    def stored(self) -> dict[str, Any]:
        return self.model_dump(mode="json")


class RailCreate(RailBody):
    id: Slug


class RailOut(Contract):
    id: str
    version: int
    created: str
    updated: str
    spec: dict[str, Any]


class DefinitionWarning(Contract):
    field: str
    rule: str = Field(description="the rule's name; the README lists each with its basis")
    detail: str


class RailSaved(RailOut):
    """A stored definition and what is unusual about it (empty when nothing is)."""

    warnings: list[DefinitionWarning]
