"""A stored rail definition turned into arrays and a thermal network for the physics kernels."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.physics.losses import PhaseLossParams, loss_coefficients
from phaseward.physics.plausibility import PlausibleRanges
from phaseward.physics.signatures import EvidenceRules
from phaseward.physics.thermal import (
    FosterStages,
    ThermalNetwork,
    build_coupled_network,
    foster_to_cauer,
)

F64 = npt.NDArray[np.float64]

# Fields of a phase override that replace the default loss model as a whole.
_LOSS_MODELS = ("power_stage", "loss_table")


@dataclass(frozen=True)
class MonitorRules:
    debounce_samples: int
    collapse_fraction: float
    imbalance_pct: float
    min_share_load_fraction: float
    undervoltage_fraction: float
    excursion_fraction: float
    gap_s: float
    forecast_horizon_s: float
    hysteresis_k: float
    process_noise_w: float
    sensor_noise_k: float
    sensor_tau_s: float | None
    sensor_offset_k: float
    stale_s: float = 5.0  # definitions stored before the setting existed get the default
    # Absent from definitions stored before sharing could be declared.
    share_learning_rate: float = 0.2
    share_significance: float = 5.0
    # Cooling drift (monitor/drift_watch.py): absent from definitions stored before it.
    drift_reference: float = 0.25
    drift_threshold: float = 35.0


@dataclass(frozen=True)
class Reliability:
    fit_at_ref: float
    ref_c: float
    activation_ev: float


@dataclass(frozen=True)
class RailModel:
    """Everything the monitor needs of one rail version. Per-phase arrays are (n_phases,)."""

    rail_id: str
    version: int
    vin_v: float
    vout_v: float
    load_a: float
    ambient_c: float
    rated_current_a: F64
    overcurrent_limit_a: F64
    junction_limit_c: F64
    warning_margin_k: F64
    dcr_ohm: F64
    dcr_ref_c: F64
    share_target: F64  # declared relative shares, mean 1 over all phases
    sense_gain: F64
    sense_offset_a: F64
    losses: PhaseLossParams
    network: ThermalNetwork
    rules: MonitorRules
    reliability: Reliability | None
    plausible: PlausibleRanges
    evidence: EvidenceRules  # thresholds captures are judged by (definition: fault_evidence)
    vout_mode: int | None  # PMBus VOUT_MODE byte for READ_VOUT words (None: not given)

    @property
    def n_phases(self) -> int:
        return int(self.rated_current_a.shape[0])

    @property
    def temp_limit_c(self) -> F64:
        """The temperature capacity and forecasts hold the junctions below."""
        return self.junction_limit_c - self.warning_margin_k


def phase_specs(spec: Mapping[str, Any]) -> list[dict[str, Any]]:
    """The effective definition of every phase: defaults with that phase's override on top."""
    phases = [dict(spec["phase"]) for _ in range(int(spec["phase_count"]))]
    for override in spec.get("overrides", []):
        given = {k: v for k, v in override.items() if k != "index" and v is not None}
        target = phases[int(override["index"])]
        if any(k in given for k in _LOSS_MODELS):
            for k in _LOSS_MODELS:
                target[k] = None
        target.update(given)
    return phases


def build(rail_id: str, version: int, spec: Mapping[str, Any]) -> RailModel:
    """Cached on the canonical JSON of the definition: a rail version never changes, but a
    deleted and re-created rail may reuse an id and version number with a new definition."""
    return _cached(rail_id, version, json.dumps(spec, sort_keys=True))


def resize_cache(size: int) -> None:
    """Keep the models of ``size`` rail versions built (setting ``rail_cache_size``): a fleet
    posting round-robin over more rails than the cache holds would rebuild every rail's
    thermal network on every sample. Least recently used go first."""
    global _cached
    if _cached.cache_info().maxsize != size:
        _cached = lru_cache(maxsize=size)(_build)


def _build(rail_id: str, version: int, spec_json: str) -> RailModel:
    spec: dict[str, Any] = json.loads(spec_json)
    phases = phase_specs(spec)

    def arr(get: Any) -> F64:
        return np.array([float(get(p)) for p in phases], dtype=np.float64)

    losses = _loss_params(spec, phases)
    target = arr(lambda p: p.get("share_target", 1.0))
    network = _network(
        tuple(
            (tuple(float(s["r_k_per_w"]) for s in p["thermal"]),
             tuple(float(s["tau_s"]) for s in p["thermal"]))
            for p in phases
        ),
        float(spec["board"]["to_ambient_k_per_w"]),
        float(spec["board"]["capacitance_j_per_k"]),
    )  # fmt: skip
    rated = arr(lambda p: p["rated_current_a"])
    trip = arr(lambda p: p["overcurrent_limit_a"])
    junction_limit = arr(lambda p: p["junction_limit_c"])
    return RailModel(
        rail_id=rail_id,
        version=version,
        vin_v=float(spec["vin_v"]),
        vout_v=float(spec["vout_v"]),
        load_a=float(spec["load_a"]),
        ambient_c=float(spec["ambient_c"]),
        rated_current_a=rated,
        overcurrent_limit_a=trip,
        junction_limit_c=junction_limit,
        warning_margin_k=arr(lambda p: p["warning_margin_k"]),
        dcr_ohm=arr(lambda p: p["inductor"]["dcr_ohm"]),
        dcr_ref_c=arr(lambda p: p["inductor"]["dcr_ref_c"]),
        share_target=target * target.size / target.sum(),
        sense_gain=arr(lambda p: p.get("sense_gain", 1.0)),
        sense_offset_a=arr(lambda p: p.get("sense_offset_a", 0.0)),
        losses=losses,
        network=network,
        rules=MonitorRules(**spec["monitor"]),
        reliability=Reliability(**spec["reliability"]) if spec.get("reliability") else None,
        plausible=_plausible(spec, losses, network, rated, trip, junction_limit),
        evidence=_evidence_rules(spec.get("fault_evidence") or {}),
        vout_mode=spec.get("vout_mode"),
    )


_cached = lru_cache(maxsize=4096)(_build)  # resized from the settings by create_app


@lru_cache(maxsize=256)
def _network(
    fosters: tuple[tuple[tuple[float, ...], tuple[float, ...]], ...],
    board_r_k_per_w: float,
    board_c_j_per_k: float,
) -> ThermalNetwork:
    """One network object for every rail of the same thermal design: the physics caches
    (discretisation, steady gains) key on the network's identity, so a fleet of identical
    boards shares them instead of recomputing a matrix exponential and a Riccati solution
    for every rail's sample once the fleet outgrows those caches."""
    chains = [
        foster_to_cauer(FosterStages(r_k_per_w=np.array(r), tau_s=np.array(tau)))
        for r, tau in fosters
    ]
    return build_coupled_network(
        chains, board_to_ambient_k_per_w=board_r_k_per_w, board_c_j_per_k=board_c_j_per_k
    )


def _evidence_rules(section: Mapping[str, Any]) -> EvidenceRules:
    """The definition's optional ``fault_evidence`` section over the documented defaults."""
    base = EvidenceRules()

    def given(key: str) -> float:
        value = section.get(key)
        return float(getattr(base, key) if value is None else value)

    limits = {
        k: (float(q), float(e), float(c)) for k, (q, e, c) in section.get("limits", {}).items()
    }
    return EvidenceRules(
        limits={**base.limits, **limits},
        min_samples_per_period=given("min_samples_per_period"),
        min_baseline_periods=given("min_baseline_periods"),
        min_phase_share=given("min_phase_share"),
        min_confidence=given("min_confidence"),
    )


# Defaults of the plausibility gate (the README's "Plausibility gate" gives each basis).
CURRENT_FACTOR = 3.0  # x trip current; common practice: the breaker holds a fault near its trip
REVERSE_FRACTION = 0.1  # of rated current; common practice: light-load negative current in
# forced-continuous mode stays a small fraction of the rating
TEMP_MIN_C = -55.0  # bottom of the usual industrial sensor range, from memory
TEMP_ABOVE_LIMIT_K = 50.0  # a reading this far past the junction limit: the part is gone
BELOW_AMBIENT_K = 15.0  # a powered stage cannot sit far below the air cooling it (common practice)
RATE_FACTOR = 2.0  # margin on the heating rate the thermal network allows
TEMP_STEP_K = 5.0  # sensor noise and quantisation between two readings, common practice
VOLTAGE_FACTOR = 2.0  # common practice: parts of a rail are rated well below twice its input


def _plausible(
    spec: Mapping[str, Any],
    losses: PhaseLossParams,
    network: ThermalNetwork,
    rated: F64,
    trip: F64,
    junction_limit: F64,
) -> PlausibleRanges:
    """The plausibility gate's ranges: the definition's ``plausibility`` section where given,
    else derived from the rest of the definition.

    The default rate bound: the junction node cannot heat faster than the loss at the trip
    current (at the junction limit, where losses are largest) over its own heat capacity,
    dT/dt <= P / C_j (the node equation C dT/dt = P - flows, with the flows out >= 0 while it
    heats); a sensor behind the junction moves slower still. Cooling is bounded by the same
    flows, so the rate holds both ways."""
    given = {k: v for k, v in (spec.get("plausibility") or {}).items() if v is not None}
    p0, slope = loss_coefficients(losses, trip)
    heat_w = p0 + slope * junction_limit
    c_junction = network.capacitance_j_per_k[network.junction_node]
    rate = (
        np.full_like(rated, float(given["temp_rate_k_per_s"]))
        if "temp_rate_k_per_s" in given
        else RATE_FACTOR * np.maximum(heat_w, 0.0) / c_junction
    )
    voltage = float(given.get("voltage_factor", VOLTAGE_FACTOR)) * float(spec["vin_v"])
    return PlausibleRanges(
        current_max_a=float(given.get("current_factor", CURRENT_FACTOR)) * trip,
        current_min_a=-(
            np.full_like(rated, float(given["reverse_band_a"]))
            if "reverse_band_a" in given
            else REVERSE_FRACTION * rated
        ),
        temp_min_c=np.full_like(rated, float(given.get("temp_min_c", TEMP_MIN_C))),
        temp_max_c=np.full_like(rated, float(given["temp_max_c"]))
        if "temp_max_c" in given
        else junction_limit + TEMP_ABOVE_LIMIT_K,
        temp_rate_k_per_s=rate,
        temp_step_k=float(given.get("temp_step_k", TEMP_STEP_K)),
        below_ambient_k=float(given.get("below_ambient_k", BELOW_AMBIENT_K)),
        vin_max_v=voltage,
        vout_max_v=voltage,
    )


def _loss_params(spec: Mapping[str, Any], phases: list[dict[str, Any]]) -> PhaseLossParams:
    n = len(phases)
    stage = [p.get("power_stage") or {} for p in phases]
    table = [p.get("loss_table") for p in phases]
    uses_table = np.array([t is not None for t in table])
    n_points = max((len(t["current_a"]) for t in table if t is not None), default=2)

    def col(rows: list[dict[str, Any]], key: str, default: float) -> F64:
        return np.array([float(r.get(key, default)) for r in rows], dtype=np.float64)

    def table_rows(key: str) -> F64:
        out = np.full((n, n_points), np.nan)
        for i, t in enumerate(table):
            if t is not None:
                out[i, : len(t[key])] = t[key]
        return out

    table_meta = [t or {} for t in table]
    return PhaseLossParams(
        vin_v=np.full(n, float(spec["vin_v"])),
        vout_v=np.full(n, float(spec["vout_v"])),
        fsw_hz=np.full(n, float(spec["switching_hz"])),
        inductance_h=np.array([p["inductor"]["inductance_h"] for p in phases], dtype=np.float64),
        dcr_ohm=np.array([p["inductor"]["dcr_ohm"] for p in phases], dtype=np.float64),
        dcr_ref_c=np.array([p["inductor"]["dcr_ref_c"] for p in phases], dtype=np.float64),
        rds_high_ohm=col(stage, "rds_high_ohm", 0.0),
        rds_low_ohm=col(stage, "rds_low_ohm", 0.0),
        rds_ref_c=col(stage, "rds_ref_c", 25.0),
        rds_tc_per_k=col(stage, "rds_tc_per_k", 0.0),
        rise_time_s=col(stage, "rise_time_s", 0.0),
        fall_time_s=col(stage, "fall_time_s", 0.0),
        gate_charge_c=col(stage, "gate_charge_c", 0.0),
        drive_v=col(stage, "drive_v", 0.0),
        dead_time_s=col(stage, "dead_time_s", 0.0),
        diode_drop_v=col(stage, "diode_drop_v", 0.0),
        core_loss_w=np.array([p["core_loss_w"] for p in phases], dtype=np.float64),
        table_current_a=table_rows("current_a"),
        table_loss_w=table_rows("loss_w"),
        table_ref_c=col(table_meta, "ref_c", 25.0),
        table_tc_per_k=col(table_meta, "tc_per_k", 0.0),
        uses_table=uses_table,
    )


def phase_power(model: RailModel, current_a: F64, active: npt.NDArray[np.bool_]) -> tuple[F64, F64]:
    """Loss of each phase as p0 + slope*T; an isolated phase dissipates nothing."""
    p0, slope = loss_coefficients(model.losses, np.where(active, np.abs(current_a), 0.0))
    return np.where(active, p0, 0.0), np.where(active, slope, 0.0)
