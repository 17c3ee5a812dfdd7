"""Rehearsals: background jobs that replay traces against candidate protection settings."""

from __future__ import annotations

import csv
import io
from typing import Annotated

from fastapi import APIRouter, Path, Request, status
from fastapi.responses import Response

from phaseward.api.auth import Operator
from phaseward.api.deps import ReadSessionDep, SessionsDep
from phaseward.api.errors import ERROR_RESPONSES, links
from phaseward.api.firmware_header import c_header
from phaseward.api.plots import pareto_svg
from phaseward.api.routes.rails import RowId
from phaseward.api.schemas.rehearsals import ExportOut, RailWindow, RehearsalIn, RehearsalOut
from phaseward.errors import Conflict, Forbidden, NotFound
from phaseward.monitor import rehearsals
from phaseward.monitor.access import Principal
from phaseward.monitor.jobs import JobRunner
from phaseward.store import jobs
from phaseward.store.models import Job

router = APIRouter(prefix="/v1/rehearsals", tags=["rehearsal"], responses=ERROR_RESPONSES)


def _out(job: Job) -> RehearsalOut:
    return RehearsalOut.model_validate(
        {
            "id": job.id,
            "status": job.status,
            "percent": job.percent,
            "error": job.error,
            "result": job.result,
        }
    )


def _job(session: ReadSessionDep, job_id: int, who: Principal) -> Job:
    """The rehearsal, if the caller's key may use the rail it replays."""
    job = jobs.get(session, job_id)
    if job is None or job.kind != rehearsals.KIND:
        raise NotFound(f"no rehearsal {job_id}", field="rehearsal_id")
    rail = rehearsals.rail_of(job.request)
    if rail is not None and not who.may_use(rail):
        raise Forbidden(
            f"this key may not use the rail of rehearsal {job_id}", field="rehearsal_id"
        )
    return job


def _done(session: ReadSessionDep, job_id: int, who: Principal) -> Job:
    job = _job(session, job_id, who)
    if job.status != "done" or job.result is None:
        raise Conflict(f"rehearsal {job_id} is {job.status}", field="rehearsal_id")
    return job


@router.post(
    "",
    status_code=status.HTTP_202_ACCEPTED,
    responses={202: links("rehearsal_id", "GET /v1/rehearsals/{rehearsal_id}",
                          "GET /v1/rehearsals/{rehearsal_id}/table.csv",
                          "GET /v1/rehearsals/{rehearsal_id}/pareto.svg")},
)  # fmt: skip
def start_rehearsal(
    body: RehearsalIn, request: Request, sessions: SessionsDep, who: Operator
) -> RehearsalOut:
    """Check and queue a rehearsal; poll ``GET /v1/rehearsals/{id}`` for progress and the
    result. Everything the job would trip over (settings, trace id, label phases and kinds) is
    refused here with 422 naming the field. Formats: README, "Rehearsal and calibration
    formats"."""
    if isinstance(body.trace, RailWindow) and not who.may_use(body.trace.rail_id):
        raise Forbidden(f"this key may not use rail '{body.trace.rail_id}'", field="trace.rail_id")
    runner: JobRunner = request.app.state.jobs
    return _out(rehearsals.submit(sessions, runner, body.model_dump(mode="json")))


@router.get("/{rehearsal_id}")
def get_rehearsal(rehearsal_id: RowId, session: ReadSessionDep, who: Operator) -> RehearsalOut:
    return _out(_job(session, rehearsal_id, who))


@router.get(
    "/{rehearsal_id}/table.csv",
    response_class=Response,
    responses={200: {"content": {"text/csv": {"schema": {"type": "string"}}}}},
)
def rehearsal_table(rehearsal_id: RowId, session: ReadSessionDep, who: Operator) -> Response:
    """One row per combination: its settings, trips, false trips, misses and latencies."""
    result = _done(session, rehearsal_id, who).result or {}
    buf = io.StringIO()
    writer = csv.writer(buf)
    rules = list(result["rows"][0]["trips_by_rule"]) if result["rows"] else []
    labels = [f"latency_s_label_{k}" for k in range(result["labels"])]
    writer.writerow(["index", *result["axes"], "trips", *[f"trips_{r}" for r in rules],
                     "false_trips", "missed", "mean_latency_s", "max_latency_s", *labels,
                     "pareto"])  # fmt: skip
    front = set(result["pareto"])
    for row in result["rows"]:
        writer.writerow([
            row["index"], *(row["settings"][a] for a in result["axes"]), row["trips"],
            *(row["trips_by_rule"][r] for r in rules), row["false_trips"], row["missed"],
            _cell(row["mean_latency_s"]), _cell(row["max_latency_s"]),
            *(_cell(x) for x in row["latency_s"]), int(row["index"] in front),
        ])  # fmt: skip
    return Response(buf.getvalue(), media_type="text/csv")


@router.get(
    "/{rehearsal_id}/pareto.svg",
    response_class=Response,
    responses={200: {"content": {"image/svg+xml": {"schema": {"type": "string"}}}}},
)
def rehearsal_pareto(rehearsal_id: RowId, session: ReadSessionDep, who: Operator) -> Response:
    result = _done(session, rehearsal_id, who).result or {}
    points = [(float(r["false_trips"]), r["max_latency_s"]) for r in result["rows"]]
    groups = [g["rows"] for g in result.get("pareto_groups", [[i] for i in result["pareto"]])]
    svg = pareto_svg(
        points, groups,
        title=f"Rehearsal {rehearsal_id}: {result['combinations']} combinations",
    )  # fmt: skip
    return Response(svg, media_type="image/svg+xml")


@router.get("/{rehearsal_id}/rows/{row}/settings.json")
def export_settings(
    rehearsal_id: RowId, row: Annotated[int, Path(ge=0)], session: ReadSessionDep, who: Operator
) -> ExportOut:
    """Row ``row`` of a finished rehearsal as firmware settings (JSON); rehearsing the
    exported settings on the same trace and labels gives the same row."""
    _job(session, rehearsal_id, who)  # the caller's rails
    return ExportOut.model_validate(rehearsals.export(session, rehearsal_id, row))


@router.get(
    "/{rehearsal_id}/rows/{row}/settings.h",
    response_class=Response,
    responses={200: {"content": {"text/x-c": {"schema": {"type": "string"}}}}},
)
def export_header(
    rehearsal_id: RowId, row: Annotated[int, Path(ge=0)], session: ReadSessionDep, who: Operator
) -> Response:
    """Row ``row`` of a finished rehearsal as a C header: one macro per setting, with the
    rail, trace, date and the row's figures in a comment."""
    _job(session, rehearsal_id, who)  # the caller's rails
    return Response(c_header(rehearsals.export(session, rehearsal_id, row)), media_type="text/x-c")


def _cell(x: float | None) -> str:
    return "" if x is None else f"{x:.6g}"
