"""Test data builders: a small rail and samples for it (invented values, tests only)."""

from __future__ import annotations

import copy
from typing import Any

SMALL_RAIL: dict[str, Any] = {
    "id": "bench-a",
    "name": "four-phase test rail",
    "vin_v": 12.0,
    "vout_v": 1.0,
    "switching_hz": 500e3,
    "load_a": 90.0,
    "ambient_c": 25.0,
    "phase_count": 4,
    "phase": {
        "rated_current_a": 30.0,
        "overcurrent_limit_a": 40.0,
        "junction_limit_c": 125.0,
        "warning_margin_k": 10.0,
        "inductor": {"inductance_h": 220e-9, "dcr_ohm": 0.3e-3},
        "power_stage": {
            "rds_high_ohm": 5e-3,
            "rds_low_ohm": 1.5e-3,
            "rise_time_s": 5e-9,
            "fall_time_s": 5e-9,
            "gate_charge_c": 20e-9,
            "dead_time_s": 20e-9,
        },
        "core_loss_w": 0.2,
        "thermal": [{"r_k_per_w": 2.0, "tau_s": 0.5}, {"r_k_per_w": 6.0, "tau_s": 20.0}],
    },
    "board": {"to_ambient_k_per_w": 1.0, "capacitance_j_per_k": 200.0},
    "monitor": {"debounce_samples": 2},
}


def rail_spec(**changes: Any) -> dict[str, Any]:
    spec = copy.deepcopy(SMALL_RAIL)
    spec.update(changes)
    return spec


def sample(seq: int, currents: list[float], *, t0: float = 1.8e9, temps: float = 60.0,
           **extra: Any) -> dict[str, Any]:  # fmt: skip
    phases = [{"index": i, "current_a": c, "temp_c": temps} for i, c in enumerate(currents)]
    return {"time": t0 + seq, "seq": seq, "vin_v": 12.0, "vout_v": 1.0, "phases": phases, **extra}
