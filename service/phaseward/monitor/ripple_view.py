"""Output ripple of the interleaved phases: as built, with the lost phases' gap, and if the
survivors were re-spaced evenly (what a controller that re-phases would give)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.monitor.rail_model import RailModel
from phaseward.physics.ripple import (
    gapped_angles_deg,
    interleaved_ripple_pp_a,
    output_ripple_voltage_pp_from_waveform_v,
    respaced_angles_deg,
)


def ripple_view(
    model: RailModel, active: npt.NDArray[np.bool_], output: Mapping[str, Any] | None
) -> dict[str, Any]:
    """Peak-to-peak output ripple current (and voltage with an output section) for three
    cases: all phases, the survivors where they are, and the survivors re-spaced. Phases
    share one inductance here (their mean) and sit at i x 360/N as built."""
    n = model.n_phases
    lost = np.flatnonzero(~active)
    if lost.size == n:
        return {"all_phases_pp_a": None, "survivors_pp_a": None, "respaced_pp_a": None}
    angles = np.full((3, n), np.nan)
    angles[0] = np.arange(n) * 360.0 / n
    angles[1, : n - lost.size] = gapped_angles_deg(n, lost) if lost.size else angles[0]
    angles[2, : n - lost.size] = respaced_angles_deg(n, lost) if lost.size else angles[0]
    args = (model.vin_v, model.vout_v, float(model.losses.inductance_h.mean()),
            float(model.losses.fsw_hz[0]), angles)  # fmt: skip
    current = interleaved_ripple_pp_a(*args)
    out: dict[str, Any] = {
        "all_phases_pp_a": float(current[0]),
        "survivors_pp_a": float(current[1]),
        "respaced_pp_a": float(current[2]),
    }
    if output is not None:
        voltage = output_ripple_voltage_pp_from_waveform_v(
            *args, capacitance_f=output["capacitance_f"], esr_ohm=output["esr_ohm"]
        )
        out |= {
            "all_phases_pp_v": float(voltage[0]),
            "survivors_pp_v": float(voltage[1]),
            "respaced_pp_v": float(voltage[2]),
        }
    return out
