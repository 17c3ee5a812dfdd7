"""Calibration: fit the thermal model of a rail's phase from a recorded heating or cooling
curve, and on request store the fit as the rail's next version."""

from __future__ import annotations

import copy
from collections.abc import Sequence
from typing import Any, Literal

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import InvalidInput
from phaseward.monitor import rail_model
from phaseward.monitor import rails as rail_service
from phaseward.physics.calibration import CalibrationFailed, CalibrationResult, OrderFit, fit_foster
from phaseward.physics.losses import phase_losses

Apply = Literal["no", "phase", "all"]


def power_of(model: rail_model.RailModel, phase: int, current_a: float, temp_c: float) -> float:
    """The loss of one phase carrying ``current_a`` at ``temp_c`` (the loss model's answer)."""
    total = phase_losses(model.losses, np.eye(model.n_phases)[phase] * current_a, temp_c).total_w
    return float(total[phase])


def calibrate(
    sessions: sessionmaker[Session],
    rail_id: str,
    *,
    t_s: Sequence[float],
    temp_c: Sequence[float],
    power_w: float | None,
    current_a: float | None,
    phase: int,
    cooling: bool,
    orders: Sequence[int],
    reference_temp_c: float | None,
    location: Literal["junction", "sensor"],
    apply: Apply,
) -> dict[str, Any]:
    with sessions() as session, session.begin():
        rail, spec = rail_service.get(session, rail_id)
    model = rail_model.build(rail.id, rail.version, spec)
    if phase >= model.n_phases:
        raise InvalidInput(
            f"phase {phase} is out of range for {model.n_phases} phases", field="phase"
        )
    if apply != "no" and location != "junction":
        raise InvalidInput(
            "a fit to a sensor describes the path to the sensor, not the junction; "
            "it cannot replace the junction network",
            field="apply",
        )
    if power_w is None:
        # The step's power from the loss model at the curve's mean temperature: conduction
        # loss grows with temperature, so a constant-power fit is an approximation here.
        assert current_a is not None  # the schema asks for one of the two
        power_w = power_of(model, phase, current_a, float(np.mean(temp_c)))
    try:
        result = fit_foster(
            t_s, temp_c, power_w, orders=orders, cooling=cooling,
            reference_temp_c=reference_temp_c, location=location,
        )  # fmt: skip
    except CalibrationFailed as err:
        raise InvalidInput(f"no model order converged: {err}", field="temp_c") from err
    except ValueError as err:
        raise InvalidInput(str(err), field=str(err).split()[0]) from err
    out = _describe(result)
    out["applied_version"] = None
    if apply != "no":
        stages = [
            {"r_k_per_w": float(r), "tau_s": float(t)}
            for r, t in zip(result.stages.r_k_per_w, result.stages.tau_s, strict=True)
        ]
        new_spec = with_thermal(spec, stages, phase=None if apply == "all" else phase)
        applied, _, _, _ = rail_service.put_version(sessions, rail_id, new_spec)
        out["applied_version"] = applied.version
    return out


def with_thermal(
    spec: dict[str, Any], stages: list[dict[str, float]], *, phase: int | None
) -> dict[str, Any]:
    """The definition with the fitted stages as the default (phase None) or one override."""
    new = copy.deepcopy(spec)
    if phase is None:
        new["phase"]["thermal"] = stages
        for override in new.get("overrides", []):
            override["thermal"] = None
        return new
    overrides = new.setdefault("overrides", [])
    for override in overrides:
        if override["index"] == phase:
            override["thermal"] = stages
            return new
    overrides.append({"index": phase, "thermal": stages})
    return new


def _fit(f: OrderFit) -> dict[str, Any]:
    def finite(x: float) -> float | None:
        return float(x) if np.isfinite(x) else None

    return {
        "order": f.order,
        "stages": [
            {
                "r_k_per_w": float(r),
                "tau_s": float(t),
                "r_ci_k_per_w": [finite(x) for x in rc],
                "tau_ci_s": [finite(x) for x in tc],
            }
            for r, t, rc, tc in zip(
                f.stages.r_k_per_w, f.stages.tau_s, f.r_ci_k_per_w, f.tau_ci_s, strict=True
            )
        ],
        "reference_temp_c": f.reference_temp_c,
        "rms_k": f.rms_k,
        "bic": f.bic,
        "ci_valid": f.ci_valid,
        "converged": f.converged,
    }


def _describe(result: CalibrationResult) -> dict[str, Any]:
    note = (
        "fitted from the power source to the junction"
        if result.location == "junction"
        else "the sensor is not at the junction: this network runs from the power source to "
        "the sensor, and the junction runs hotter than it shows"
    )
    return {
        "order": result.order,
        "criterion": result.criterion,
        "power_w": result.power_w,
        "location": result.location,
        "cooling": result.cooling,
        "note": note,
        "chosen": _fit(result.chosen),
        "fits": [_fit(f) for f in result.fits],
    }
