"""Calibration: fit the thermal model of a rail's phase from a recorded heating or cooling
curve, and on request store the fit as the rail's next version; or fit a curve with a known
power step and no rail at all (:func:`fit_curve`)."""

from __future__ import annotations

import copy
import re
from collections.abc import Sequence
from typing import Any, Literal

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import InvalidInput
from phaseward.monitor import rail_model
from phaseward.monitor import rails as rail_service
from phaseward.physics.calibration import (
    SETTLED_TAUS,
    CalibrationFailed,
    CalibrationResult,
    OrderFit,
    fit_foster,
)
from phaseward.physics.losses import phase_losses

Apply = Literal["no", "phase", "all"]
TimeUnit = Literal["s", "ms", "us"]
SECONDS = {"s": 1.0, "ms": 1e-3, "us": 1e-6}
SETTLED_RULE = (
    f"settled when the curve lasts at least {SETTLED_TAUS:g} times the slowest fitted time "
    "constant (that stage within 5 % of its end)"
)


def fit_curve(
    *,
    t_s: Sequence[float],
    temp_c: Sequence[float],
    power_w: float,
    cooling: bool,
    orders: Sequence[int],
    reference_temp_c: float | None,
    location: Literal["junction", "sensor"],
    time_unit: TimeUnit = "s",
) -> dict[str, Any]:
    """Fit a curve whose power step is known; no rail needed, nothing stored."""
    return _describe(
        _fit(t_s, temp_c, power_w, cooling, orders, reference_temp_c, location, time_unit)
    )


def _fit(
    t: Sequence[float],
    temp_c: Sequence[float],
    power_w: float,
    cooling: bool,
    orders: Sequence[int],
    reference_temp_c: float | None,
    location: Literal["junction", "sensor"],
    time_unit: TimeUnit,
) -> CalibrationResult:
    try:
        return fit_foster(
            np.asarray(t, dtype=np.float64) * SECONDS[time_unit], temp_c, power_w,
            orders=orders, cooling=cooling, reference_temp_c=reference_temp_c,
            location=location,
        )  # fmt: skip
    except CalibrationFailed as err:
        raise InvalidInput(f"no model order converged: {err}", field="temp_c") from err
    except ValueError as err:  # the message starts with the argument's name
        name = re.match(r"\w+", str(err))
        raise InvalidInput(str(err), field=name.group(0) if name else "body") from err


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
    time_unit: TimeUnit = "s",
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
    result = _fit(t_s, temp_c, power_w, cooling, orders, reference_temp_c, location, time_unit)
    out = _describe(result)
    if apply != "no" and not result.chosen.settled:
        raise InvalidInput(
            f"the curve is not settled ({SETTLED_RULE}): its total thermal resistance is an "
            "extrapolation, too uncertain to store; record a longer curve",
            field="apply",
        )
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


def _order(f: OrderFit) -> dict[str, Any]:
    finite = _finite

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
        "total_r_k_per_w": f.total_r_k_per_w,
        "total_r_ci_k_per_w": [finite(x) for x in f.total_r_ci_k_per_w],
        "settled": f.settled,
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
        "chosen": _order(result.chosen),
        "fits": [_order(f) for f in result.fits],
        "skipped_orders": list(result.skipped_orders),
        "settled": result.chosen.settled,
        "settled_rule": SETTLED_RULE,
        "warnings": list(result.warnings),
        "reference_offset_k": _finite(result.reference_offset_k),
        "reference_offset_ci_k": [_finite(x) for x in result.reference_offset_ci_k],
        "applied_version": None,
    }


def _finite(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None
