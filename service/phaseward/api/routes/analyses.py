"""Degraded-mode analyses of one rail."""

from __future__ import annotations

from typing import Annotated

import numpy as np
import numpy.typing as npt
from fastapi import APIRouter, Query
from pydantic import Field

from phaseward.api.auth import Operator, RailOperator
from phaseward.api.deps import ReadSessionDep, SessionsDep
from phaseward.api.errors import ERROR_RESPONSES
from phaseward.api.routes.rails import RailId
from phaseward.api.schemas.analyses import (
    MAX_HORIZON_S,
    BreakerIn,
    BreakerOut,
    CalibrationIn,
    CalibrationOut,
    CurveFitOut,
    CurveIn,
    ForecastIn,
    ForecastOut,
    LoadProfile,
    RatingsOut,
    ReliabilityOut,
    ScreeningOut,
)
from phaseward.errors import Forbidden, InvalidInput
from phaseward.monitor import breaker_check, calibrations
from phaseward.monitor.forecast import Drop, Profile, forecast
from phaseward.monitor.live import live_rail
from phaseward.monitor.ratings import DEFAULT_DURATIONS_S, ratings
from phaseward.monitor.reliability import mission
from phaseward.monitor.screening import cascades, screen

router = APIRouter(prefix="/v1/rails", tags=["analyses"], responses=ERROR_RESPONSES)
F64 = npt.NDArray[np.float64]


@router.get("/{rail_id}/screening")
def get_screening(
    rail_id: RailId,
    session: ReadSessionDep,
    _: RailOperator,
    depth: Annotated[int, Query(ge=1, le=2, description="1: every single loss, 2: every pair")] = 1,
) -> ScreeningOut:
    live = live_rail(session, rail_id)
    result = screen(
        live.model, active=live.active, weights=live.weights, load_a=live.load_a,
        nodes_c=live.nodes_c, ambient_c=live.ambient_c, depth=depth,
    )  # fmt: skip
    views = cascades(
        live.model, lost=result.lost, active=live.active, weights=live.weights,
        load_a=live.load_a, nodes_c=live.nodes_c, ambient_c=live.ambient_c,
    )  # fmt: skip
    by_loss = {tuple(result.lost[j].tolist()): v for j, v in enumerate(views)}
    rows = [r | by_loss[tuple(r["lose_phases"])] for r in result.rows()]
    return ScreeningOut.model_validate(
        {
            "rail_id": rail_id,
            "version": live.model.version,
            "depth": depth,
            "load_a": live.load_a,
            "secure": result.secure,
            "overloading": [r["lose_phases"] for r in rows if r["overloads"]],
            "cases": rows,
        }
    )


def _profile(load: LoadProfile | None, present_a: float) -> Profile:
    if load is None or load.constant_a is not None:
        value = present_a if load is None or load.constant_a is None else load.constant_a
        return Profile(np.zeros(1), np.array([value]), stepwise=True)
    rows = load.steps if load.steps is not None else load.points
    assert rows is not None  # the schema guarantees one shape
    times = np.array([r.at_s for r in rows])
    return Profile(times, np.array([r.current_a for r in rows]), stepwise=load.steps is not None)


@router.post("/{rail_id}/forecast")
def post_forecast(
    rail_id: RailId, body: ForecastIn, session: ReadSessionDep, _: RailOperator
) -> ForecastOut:
    """Junction and board temperatures under a load profile from the present estimated
    state, exact per stretch of constant load and phase set, with the cascade of trips."""
    live = live_rail(session, rail_id)
    for k, d in enumerate(body.drop):
        if d.phase >= live.model.n_phases:
            raise InvalidInput(
                f"phase {d.phase} is out of range for {live.model.n_phases} phases",
                field=f"drop[{k}].phase",
            )
    result = forecast(
        live.model, active=live.active, weights=live.weights, nodes_c=live.nodes_c,
        ambient_c=live.ambient_c if body.ambient_c is None else body.ambient_c,
        profile=_profile(body.load, live.load_a), drops=[Drop(d.phase, d.at_s) for d in body.drop],
        horizon_s=body.horizon_s, points=body.points,
    )  # fmt: skip
    return ForecastOut.model_validate(
        {"rail_id": rail_id, "version": live.model.version, "start_s": live.t_s, **result}
    )


@router.get("/{rail_id}/ratings")
def get_ratings(
    rail_id: RailId,
    session: ReadSessionDep,
    _: RailOperator,
    duration_s: Annotated[
        list[Annotated[float, Field(gt=0, le=MAX_HORIZON_S * 30)]] | None,
        Query(
            max_length=12,
            description="durations in s (repeat the parameter); default 60, 600 and 3600; "
            "indefinitely is always added",
        ),
    ] = None,
    pairs: Annotated[bool, Query(description="also every pair of further losses")] = False,
) -> RatingsOut:
    """Time-limited ratings from the present estimated state: for the rail as it is and for
    every further loss, the highest constant load it carries for each duration."""
    live = live_rail(session, rail_id)
    result = ratings(live, durations_s=duration_s or DEFAULT_DURATIONS_S, pairs=pairs)
    return RatingsOut.model_validate(
        {"rail_id": rail_id, "version": live.model.version, "start_s": live.t_s, **result}
    )


@router.get("/{rail_id}/reliability")
def get_reliability(
    rail_id: RailId,
    session: ReadSessionDep,
    _: RailOperator,
    hours: Annotated[float, Query(gt=0, le=1e6, description="mission time")],
) -> ReliabilityOut:
    live = live_rail(session, rail_id)
    return ReliabilityOut.model_validate(
        {"rail_id": rail_id, "version": live.model.version, **mission(live, hours)}
    )


tools = APIRouter(prefix="/v1/tools", tags=["tools"], responses=ERROR_RESPONSES)


@tools.post("/breaker-stress")
def post_breaker_stress(body: BreakerIn, _: Operator) -> BreakerOut:
    """Peak junction rise of the breaker's pass MOSFET while it limits a short, against its
    junction limit and its safe operating area."""
    result = breaker_check.check(
        vin_v=body.vin_v, current_limit_a=body.current_limit_a, delay_s=body.delay_s,
        foster=[(s.r_k_per_w, s.tau_s) for s in body.foster], start_temp_c=body.start_temp_c,
        junction_limit_c=body.junction_limit_c, soa=[(p.time_s, p.current_a) for p in body.soa],
        curve_points=body.curve_points,
    )  # fmt: skip
    return BreakerOut.model_validate(result)


@router.post("/{rail_id}/calibrations")
def post_calibration(
    rail_id: RailId, body: CalibrationIn, sessions: SessionsDep, who: RailOperator
) -> CalibrationOut:
    """Fit Foster networks of the asked orders to the curve, choose the order by BIC, and on
    request store the chosen fit as the rail's next version."""
    if body.apply != "no" and not who.grants("admin"):
        raise Forbidden("storing a fit as a new rail version needs an admin key", field="apply")
    result = calibrations.calibrate(
        sessions, rail_id, t_s=body.t_s, temp_c=body.temp_c, power_w=body.power_w,
        current_a=body.current_a, phase=body.phase, cooling=body.cooling, orders=body.orders,
        reference_temp_c=body.reference_temp_c, location=body.location, apply=body.apply,
        time_unit=body.time_unit,
    )  # fmt: skip
    return CalibrationOut.model_validate({"rail_id": rail_id, **result})


@tools.post("/calibrations")
def post_curve_fit(body: CurveIn, _: Operator) -> CurveFitOut:
    """Fit Foster networks to a heating or cooling curve with a known power step, no rail
    needed (nothing is stored); the same fit, verdict and warnings as a rail's calibration."""
    result = calibrations.fit_curve(
        t_s=body.t_s, temp_c=body.temp_c, power_w=body.power_w, cooling=body.cooling,
        orders=body.orders, reference_temp_c=body.reference_temp_c, location=body.location,
        time_unit=body.time_unit,
    )  # fmt: skip
    return CurveFitOut.model_validate(result)
