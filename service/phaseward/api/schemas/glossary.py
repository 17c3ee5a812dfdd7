"""What every field of the API means, with its unit: filled into the OpenAPI document for each
schema property that does not describe itself in its model (``Field(description=...)`` wins).

Keyed by field name, since a name means one thing across the contract (``time_s`` is always
seconds); ``"Schema.field"`` keys say more where one schema uses a name its own way. The test
``tests/docs/test_openapi_descriptions.py`` fails on any field left undescribed, so a new
field needs either a description in its model or a line here.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any, Final

from phaseward.demo import DEMO_RAIL

BY_NAME: Final[dict[str, str]] = {
    # identity and bookkeeping
    "id": "identifier (a rail's id: letters, digits, '-', '_', '.')",
    "rail_id": "the rail's identifier",
    "name": "a human-readable name",
    "version": "the rail definition's version (each change of definition adds one)",
    "state_version": "counter of the rail's live state, increased by every stored sample",
    "created": "when it was created (ISO 8601, UTC)",
    "updated": "when it last changed (ISO 8601, UTC)",
    "spec": "the stored definition",
    "time": "when, ISO 8601 with a UTC offset (or epoch seconds in a sample)",
    "time_s": "time, s (epoch seconds for stored times; s from the start for forecasts)",
    "seq": "the sample's sequence number from the sender, increasing by sample",
    "age_s": "how long ago it was, s",
    "count": "how many samples",
    "items": "the page's items, newest first",
    "truncated": "true: more than the page holds; ask again from the last one",
    "interval_s": "length of one interval, s",
    "rows": "one row per interval or per combination",
    "error": "machine-readable error code (null while none)",
    "detail": "what went wrong, for people",
    "field": "the offending field, dotted path (null when the whole request is wrong)",
    "status": "where the job is: queued, running, done or failed",
    "percent": "progress of the job, %",
    "caution": "phaseward is a monitoring aid: this answer is no protection verdict",
    "note": "a free note",
    "by": "who acknowledges it",
    "ack_note": "the acknowledgement's note",
    "acked_by": "who acknowledged the event (null: not yet)",
    "acked_at": "when the event was acknowledged (ISO 8601, UTC; null: not yet)",
    "message": "the event, for people",
    "details": "the event's numbers, by name (units in the names)",
    "kind": "what kind of thing it is (events: dotted, e.g. phase.isolated)",
    "severity": "info, warning or critical",
    # electrical quantities
    "vin_v": "input voltage, V",
    "vout_v": "output voltage, V",
    "switching_hz": "switching frequency of each phase, Hz",
    "load_a": "rail load current, A",
    "rated_load_a": "the load the rail must deliver, A",
    "current_a": "current, A",
    "iout_a": "rail output current as the controller reports it, A",
    "constant_a": "a constant load current, A",
    "rated_current_a": "continuous current rating of one phase, A",
    "overcurrent_limit_a": "per-phase over-current limit, A",
    "current_limit_a": "the hot-swap switch's current limit during a short, A",
    "capacity_a": "the most current the remaining phases can deliver, A",
    "step_a": "a change of rail current this large counts as a load step, A",
    "dcr_ohm": "inductor DC resistance at dcr_ref_c, ohm",
    "inductance_h": "phase inductance, H",
    "capacitance_f": "output capacitance, F",
    "esr_ohm": "equivalent series resistance of the output capacitors, ohm",
    "rds_high_ohm": "high-side switch on-resistance at rds_ref_c, ohm",
    "rds_low_ohm": "low-side switch on-resistance at rds_ref_c, ohm",
    "rds_tc_per_k": "relative change of on-resistance per kelvin, 1/K",
    "rise_time_s": "switch-node rise time, s",
    "fall_time_s": "switch-node fall time, s",
    "gate_charge_c": "total gate charge per switching cycle, C",
    "drive_v": "gate drive voltage, V",
    "dead_time_s": "time both switches are off per transition, s",
    "diode_drop_v": "body diode forward voltage, V",
    "core_loss_w": "inductor core loss, W",
    "loss_w": "power-stage loss at each tabulated current, W",
    "power_w": "power, W",
    "all_phases_pp_v": "output ripple voltage with every phase running, V peak to peak",
    "all_phases_pp_a": "output ripple current with every phase running, A peak to peak",
    "survivors_pp_v": "output ripple voltage of the surviving phases as they are, V peak to peak",
    "survivors_pp_a": "output ripple current of the surviving phases as they are, A peak to peak",
    "respaced_pp_v": "output ripple voltage with the survivors re-spaced evenly, V peak to peak",
    "respaced_pp_a": "output ripple current with the survivors re-spaced evenly, A peak to peak",
    # thermal quantities
    "ambient_c": "ambient (inlet air) temperature, degC",
    "temp_c": "temperature, degC",
    "board_c": "board node temperature at each time, degC",
    "junction_limit_c": "junction temperature limit, degC",
    "warning_margin_k": "the warning line sits this far below the junction limit, K",
    "dcr_ref_c": "temperature at which dcr_ohm holds, degC",
    "rds_ref_c": "temperature at which the on-resistances hold, degC",
    "ref_c": "reference temperature, degC",
    "tc_per_k": "relative change of loss per kelvin, 1/K",
    "reference_temp_c": "the temperature the rise is counted from, degC",
    "start_temp_c": "junction temperature before the short, degC",
    "hottest_temp_c": "hottest junction now, degC",
    "hottest_phase": "the phase with the hottest junction",
    "margin_k": "distance to the junction limit, K (negative: beyond it)",
    "margin_to_warning_k": "distance to the warning line, K (negative: beyond it)",
    "rise_k": "junction temperature rise, K",
    "peak_junction_c": "highest junction temperature, degC",
    "steady_junction_c": "steady-state junction temperature of each phase, degC",
    "r_k_per_w": "thermal resistance of the stage, K/W",
    "tau_s": "time constant of the stage, s",
    "tau_ci_s": "95 % confidence interval of tau_s, s",
    "to_ambient_k_per_w": "thermal resistance from the board node to ambient, K/W",
    "capacitance_j_per_k": "heat capacity of the board node, J/K",
    "thermal": "Foster stages from the power stage to its junction (the list) or thermal state",
    "foster": "Foster stages of the switch's thermal impedance, junction to case",
    "runaway": "true: no steady state (thermal runaway)",
    "limit_phase": "the phase that reaches its limit first (null: none)",
    # phases and definition sections
    "phase": "a phase's index, from 0",
    "index": "the phase's index, from 0",
    "phase_count": "number of phases",
    "phases": "per-phase values, one item per phase",
    "inductor": "the phase's inductor",
    "power_stage": "the phase's power stage (driver and switches)",
    "loss_table": "tabulated loss versus current from a datasheet, instead of the loss model",
    "board": "the board node the phases share, to ambient",
    "output": "the output capacitor bank, for ripple",
    "reliability": "per-phase failure rate for reliability answers",
    "monitor": "how telemetry is watched: debounce, thresholds, estimator",
    "overrides": "per-phase values that differ from the common phase definition",
    "fit_at_ref": "failures per 1e9 phase-hours at ref_c (FIT)",
    "activation_ev": "Arrhenius activation energy, eV",
    "sense_v": "current-sense voltage across the inductor DCR, V",
    "read_iout": "raw PMBus READ_IOUT word (LINEAR11), the phase current in A once decoded",
    "breaker_tripped": "true: the phase's breaker (hot-swap switch) has opened",
    "driver_disabled": "true: the phase's driver is disabled",
    "overcurrent": "true: the phase reports an over-current fault",
    "overtemperature": "true: the phase reports an over-temperature fault",
    "event": "the server-sent event's type",
    "data": "the event, as JSON",
    "retry": "reconnect after this long, ms",
    "flags": "fault flags of each phase (names, or bit masks per sample)",
    # monitor settings
    "debounce_samples": "samples in a row before a condition is believed",
    "collapse_fraction": "a phase below this fraction of its share counts as collapsed, 0..1",
    "imbalance_pct": "deviation from an equal share that counts as imbalance, %",
    "min_share_load_fraction": "sharing is judged above this fraction of the rated load, 0..1",
    "undervoltage_fraction": "input below this fraction of vin_v is under-voltage, 0..1",
    "excursion_fraction": "output off vout_v by more than this fraction is an excursion, 0..1",
    "gap_s": "no sample for this long is a telemetry gap, s",
    "forecast_horizon_s": "how far ahead the live thermal forecast looks, s",
    "hysteresis_k": "a thermal watch clears this far back inside its line, K",
    "process_noise_w": "the estimator's process noise, W",
    "sensor_noise_k": "temperature sensor noise, K (standard deviation)",
    "sensor_offset_k": "the sensor reads this much below the junction, K",
    # status
    "condition": "the rail's (or phase's) condition",
    "capacity": "remaining capacity and what limits it",
    "last_sample": "the newest sample stored",
    "screening": "N-1 screening at the present load",
    "ripple": "output ripple with and without the lost phases",
    "binding": "what limits the capacity: current, thermal, or none",
    "binding_phase": "the phase that limits the capacity (null: none)",
    # analyses
    "depth": "further phase losses considered at once",
    "lose_phases": "the phases this case loses",
    "lose_phase": "the phase this case loses",
    "overloads": "true: this case overloads the rail",
    "drop": "phases lost during the forecast",
    "at_s": "when, s from the start",
    "horizon_s": "how far ahead, s",
    "points": "time points in the answer",
    "steps": "load steps: the load from each at_s on",
    "dt_s": "time step of the answer, s",
    "peak": "the hottest point of the forecast",
    "hours": "mission time, h",
    "present": "with the phases active now",
    "n_minus_1": "after each single further loss",
    "survival_probability": "probability that enough phases survive the mission, 0..1",
    "failure_probability": "probability that too few survive the mission, 0..1",
    "delay_s": "breaker delay: how long the switch limits the current, s",
    "curve_points": "delays in the answer's curve",
    "soa": "the switch's safe operating area: current allowed for each pulse time",
    "soa_allowed_a": "current the safe operating area allows for this time, A",
    "soa_margin_a": "allowed minus limited current, A (negative: outside)",
    "within_soa_data": "true: the time lies within the given SOA points (no extrapolation)",
    "passes": "true: within the junction limit and the safe operating area",
    "at_delay": "the check at the breaker delay",
    "curve": "the check at delays up to the breaker delay",
    # calibration
    "t_s": "sample times of the curve, s from the power step",
    "cooling": "true: a cooling curve (power switched off at t = 0)",
    "location": "where the temperature was read: junction or sensor",
    "orders": "Foster orders to try",
    "apply": "store the chosen fit: no, for this phase, or for all phases",
    "fits": "one fit per order tried",
    "chosen": "the fit of the chosen order",
    "order": "number of Foster stages",
    "stages": "the fitted stages",
    "rms_k": "root-mean-square residual of the fit, K",
    "bic": "Bayesian information criterion of the fit (lower is better)",
    "converged": "true: the fit converged",
    "ci_valid": "true: the confidence intervals could be computed",
    "criterion": "the criterion that chose the order",
    "applied_version": "the rail version the fit was stored as (null: not applied)",
    # ingest
    "stored": "samples stored",
    "duplicates": "samples already stored (same seq and content): absorbed",
    "late": "samples older than the newest: stored, live state not rolled back",
    # history and traces
    "t_start_s": "start of the interval, epoch s",
    "t_end_s": "end of the interval, epoch s",
    "min": "smallest value in the interval",
    "max": "largest value in the interval",
    "mean": "mean value over the interval",
    "n_samples": "samples in the trace",
    "n_phases": "phases in the trace",
    "start_s": "start, s",
    "end_s": "end, s",
    "trace_id": "a stored trace's id",
    "trace": "the trace to replay: a stored one, or a window of a rail's samples",
    "settings": "protection settings: a value, or a list to sweep",
    "labels": "the faults really present, to count trips, false trips and latency",
    # rehearsal settings
    "oc_level_a": "per-phase over-current level, A",
    "oc_debounce_s": "how long over-current must hold, s",
    "ot_level_c": "per-phase over-temperature level, degC",
    "ot_debounce_s": "how long over-temperature must hold, s",
    "imbalance_debounce_s": "how long an imbalance must hold, s",
    "imbalance_min_load_a": "imbalance is judged above this rail load, A",
    "dead_floor_a": "a phase below this current may be dead, A",
    "dead_others_min_a": "... while the others carry at least this, A",
    "uv_level_v": "input under-voltage level, V",
    "uv_debounce_s": "how long under-voltage must hold, s",
    "blanking_s": "after a load step, the current rules wait this long, s",
}

BY_SCHEMA: Final[dict[str, str]] = {
    "ProtectionSettingsIn.dead_time_s": "how long a phase must read near zero to count as dead, s",
    "ProtectionSettingsIn.imbalance_pct": "deviation from an equal share that trips, %",
    "EventOut.time_s": "when, epoch s",
    "EventOut.phase": "the phase it concerns (null: the whole rail)",
    "EventOut.version": "the rail definition's version in force then",
    "FaultLabel.phase": "the faulty phase, or -1 for the rail (input)",
    "FaultLabel.start_s": "start of the fault, s on the trace's time axis",
    "FaultLabel.end_s": "end of the fault, s on the trace's time axis",
    "TraceOut.start_s": "time of the first sample, s",
    "TraceOut.end_s": "time of the last sample, s",
    "LoadPoint.current_a": "rail load from at_s on, A",
    "SoaPoint.current_a": "current allowed for a pulse of time_s, A",
    "SoaPoint.time_s": "pulse time, s",
    "CalibrationIn.current_a": "the phase current during the step, A (or give power_w)",
    "CalibrationIn.power_w": "the power step, W (or give current_a)",
    "CalibrationIn.temp_c": "temperature at each t_s, degC",
    "CalibrationIn.phase": "the phase that was heated",
    "Peak.time_s": "when, s from the start",
    "ForecastOut.time_s": "time points, s from the start",
    "ForecastOut.start_s": "when the forecast starts, epoch s",
    "SampleWindow.time_s": "each sample's time, epoch s",
    "LastSample.time_s": "its time, epoch s",
    "RailStatus.phases": "each phase's condition, current, temperature and share",
    "RailStatus.thermal": "junction temperatures, margins and time to the lines",
    "PhaseOverride.index": "the phase these values apply to",
    "ReliabilityOut.hours": "mission time, h",
    "RailOut.id": "the rail's identifier",
    "RehearsalOut.id": "the rehearsal job's id",
    "TraceOut.id": "the stored trace's id",
    "TraceOut.name": "the uploaded file's name",
    "RehearsalOut.error": "why the job failed (null: it did not)",
    "CalibrationOut.note": "what the fitted stages describe",
    "BreakerOut.power_w": "power in the switch while it limits the current, W",
    "HistoryRow.count": "samples in the interval",
}

SAMPLE_EXAMPLE: Final[dict[str, Any]] = {
    "time": "2026-03-04T10:15:00+00:00",
    "seq": 600,
    "vin_v": 12.0,
    "vout_v": 0.75,
    "phases": [
        {"index": 0, "current_a": 35.4, "temp_c": 71.2},
        {"index": 1, "sense_v": 0.0105, "temp_c": 70.8},
        {"index": 2, "current_a": 0.0, "temp_c": 45.0, "breaker_tripped": True},
        {"index": 3, "read_iout": 59672, "temp_c": 69.9},
        {"index": 4, "current_a": 34.6, "temp_c": 70.3},
        {"index": 5, "current_a": 35.9, "temp_c": 71.5},
    ],
}
EXAMPLES: Final[dict[str, Any]] = {"RailCreate": DEMO_RAIL, "SampleIn": SAMPLE_EXAMPLE}


def schemas(node: Any) -> Iterator[tuple[str, dict[str, Any]]]:
    """Every object schema anywhere in the document (components, and the ones inlined in a
    path's request body), with its model's name (its title)."""
    if isinstance(node, dict):
        if isinstance(node.get("properties"), dict):
            yield str(node.get("title", "")), node
        for value in node.values():
            yield from schemas(value)
    elif isinstance(node, list):
        for value in node:
            yield from schemas(value)


def describe(document: dict[str, Any]) -> dict[str, Any]:
    """Fill in the description of every schema property that has none, and the examples of
    the rail definition and the sample; returns the same document."""
    for name, schema in schemas(document):
        for field, prop in schema["properties"].items():
            if isinstance(prop, dict) and "description" not in prop:
                text = BY_SCHEMA.get(f"{name}.{field}") or BY_NAME.get(field)
                if text is not None:
                    prop["description"] = text
        if name in EXAMPLES:
            schema.setdefault("examples", [EXAMPLES[name]])
    return document
