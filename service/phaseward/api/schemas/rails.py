"""Rail definitions: what the converter is, so that physics can judge what it may still do."""

from __future__ import annotations

from typing import Annotated, Any, Self

from pydantic import Field, ValidationInfo, field_validator, model_validator

from phaseward.api.schemas.common import (
    Celsius,
    Contract,
    KelvinPerWatt,
    NonNegative,
    Positive,
    Seconds,
)

Slug = Annotated[str, Field(pattern=r"^[a-z0-9][a-z0-9-]{0,63}$", max_length=64)]


class InductorSpec(Contract):
    inductance_h: Positive
    dcr_ohm: Positive
    dcr_ref_c: Celsius = 20.0


class PowerStageSpec(Contract):
    """Analytic switch losses (Erickson & Maksimovic); Rds(on) rises linearly with T."""

    rds_high_ohm: Positive
    rds_low_ohm: Positive
    rds_ref_c: Celsius = 25.0
    rds_tc_per_k: Annotated[float, Field(ge=0, le=0.05)] = 0.004  # typical Si MOSFET, from memory
    rise_time_s: NonNegative = 0.0
    fall_time_s: NonNegative = 0.0
    gate_charge_c: NonNegative = 0.0
    drive_v: NonNegative = 5.0
    dead_time_s: NonNegative = 0.0
    diode_drop_v: NonNegative = 0.7


class LossTableSpec(Contract):
    """Power-stage loss versus phase current from a datasheet curve at ``ref_c``."""

    current_a: list[NonNegative] = Field(min_length=2, max_length=64)
    loss_w: list[NonNegative] = Field(min_length=2, max_length=64)
    ref_c: Celsius = 25.0
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
    rated_current_a: Positive
    overcurrent_limit_a: Positive
    junction_limit_c: Celsius
    warning_margin_k: NonNegative = 10.0
    inductor: InductorSpec
    power_stage: PowerStageSpec | None = None
    loss_table: LossTableSpec | None = None
    core_loss_w: NonNegative = 0.0
    thermal: list[FosterStage] = Field(min_length=1, max_length=6)

    @model_validator(mode="after")
    def _one_loss_model(self) -> Self:
        if (self.power_stage is None) == (self.loss_table is None):
            raise ValueError("give exactly one of power_stage or loss_table")
        return self


class PhaseOverride(Contract):
    """Per-phase exceptions: any top-level phase field given here replaces the default."""

    index: Annotated[int, Field(ge=0)]
    rated_current_a: Positive | None = None
    overcurrent_limit_a: Positive | None = None
    junction_limit_c: Celsius | None = None
    warning_margin_k: NonNegative | None = None
    inductor: InductorSpec | None = None
    power_stage: PowerStageSpec | None = None
    loss_table: LossTableSpec | None = None
    core_loss_w: NonNegative | None = None
    thermal: list[FosterStage] | None = Field(default=None, min_length=1, max_length=6)


class BoardSpec(Contract):
    """The shared board node every phase's thermal chain ends on, and its path to ambient."""

    to_ambient_k_per_w: KelvinPerWatt
    capacitance_j_per_k: Positive


class MonitorSpec(Contract):
    """How telemetry is judged (not the hardware's protection, which stays in hardware)."""

    debounce_samples: Annotated[int, Field(ge=1, le=100)] = 3
    collapse_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.1
    imbalance_pct: Annotated[float, Field(gt=0, le=500)] = 25.0
    min_share_load_fraction: Annotated[float, Field(ge=0, lt=1)] = 0.2
    undervoltage_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.85
    excursion_fraction: Annotated[float, Field(gt=0, lt=1)] = 0.05
    gap_s: Positive = 10.0
    forecast_horizon_s: Positive = 900.0
    hysteresis_k: NonNegative = 2.0
    # The junction estimator: how far to trust the loss model and the temperature sensors.
    process_noise_w: Positive = 0.2
    sensor_noise_k: Positive = 0.5
    sensor_tau_s: Positive | None = Field(
        default=None, description="first-order lag of the sensor behind the junction"
    )
    sensor_offset_k: float = Field(default=0.0, ge=-50, le=50)


class ReliabilitySpec(Contract):
    """Per-phase failure rate at a reference temperature, accelerated per JEDEC JEP122."""

    fit_at_ref: Positive = Field(description="failures per 1e9 phase-hours at ref_c")
    ref_c: Celsius
    activation_ev: Annotated[float, Field(gt=0, le=3)] = 0.7  # a usual default, common practice


class OutputSpec(Contract):
    """The output capacitor bank, for the ripple voltage the interleaving leaves."""

    capacitance_f: Positive
    esr_ohm: NonNegative = 0.0


class RailBody(Contract):
    """A rail definition as PUT takes it (the id comes from the path)."""

    name: Annotated[str, Field(min_length=1, max_length=200)]
    vin_v: Positive
    vout_v: Positive
    switching_hz: Positive
    load_a: Positive
    ambient_c: Celsius = 25.0
    phase_count: Annotated[int, Field(ge=1, le=32)]
    phase: PhaseSpec
    overrides: list[PhaseOverride] = Field(default_factory=list, max_length=32)
    board: BoardSpec
    monitor: MonitorSpec = Field(default_factory=MonitorSpec)
    reliability: ReliabilitySpec | None = None
    output: OutputSpec | None = None

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
