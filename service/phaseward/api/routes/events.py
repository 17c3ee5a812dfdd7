"""Events: filtered, newest first, cursor pages, JSON or CSV; acknowledgement."""

from __future__ import annotations

import csv
import io
from datetime import datetime
from typing import Annotated

from fastapi import APIRouter, Query, Request
from fastapi.responses import Response

from phaseward.api.deps import ReadSessionDep, SessionsDep, SettingsDep
from phaseward.api.errors import ERROR_RESPONSES
from phaseward.api.routes.rails import RailId
from phaseward.api.schemas.events import CSV_COLUMNS, SEVERITIES, AckIn, EventOut, EventPage
from phaseward.errors import InvalidInput
from phaseward.monitor import rails as rail_service
from phaseward.monitor.acknowledge import acknowledge
from phaseward.store import events as event_store

router = APIRouter(tags=["events"], responses=ERROR_RESPONSES)

KindQ = Annotated[list[str], Query(max_length=20, description="event kind, repeatable")]
SeverityQ = Annotated[list[str], Query(max_length=3, description="info, warning, critical")]
TimeQ = Annotated[str | None, Query(max_length=40, description="RFC 3339 or epoch seconds")]


def _time(value: str | None, name: str) -> float | None:
    if value is None:
        return None
    try:
        return float(value)
    except ValueError:
        pass
    try:
        moment = datetime.fromisoformat(value)
    except ValueError as err:
        raise InvalidInput(f"{name} is neither RFC 3339 nor epoch seconds", field=name) from err
    if moment.tzinfo is None:
        raise InvalidInput(f"{name} needs a UTC offset", field=name)
    return moment.timestamp()


def _page(
    request: Request,
    session: ReadSessionDep,
    settings: SettingsDep,
    *,
    rail_id: str | None,
    kind: list[str],
    severity: list[str],
    phase: int | None,
    since: str | None,
    until: str | None,
    cursor: str | None,
    limit: int,
) -> EventPage | Response:
    for s in severity:
        if s not in SEVERITIES:
            raise InvalidInput(f"unknown severity '{s}'", field="severity")
    if cursor is not None and not cursor.isdigit():
        raise InvalidInput("cursor must be the next_cursor of a previous page", field="cursor")
    flt = event_store.EventFilter(
        rail_id=rail_id, kinds=tuple(kind), severities=tuple(severity), phase=phase,
        since_s=_time(since, "since"), until_s=_time(until, "until"),
    )  # fmt: skip
    size = min(limit, settings.max_page_size)
    rows = event_store.page(
        session, flt, before_id=None if cursor is None else int(cursor), limit=size
    )
    items = [EventOut.of(e) for e in rows]
    next_cursor = str(rows[-1].id) if len(rows) == size else None
    if "text/csv" in request.headers.get("accept", ""):
        buf = io.StringIO()
        writer = csv.writer(buf)
        writer.writerow(CSV_COLUMNS)
        for e in items:
            writer.writerow([getattr(e, c) for c in CSV_COLUMNS])
        headers = {"X-Next-Cursor": next_cursor} if next_cursor else {}
        return Response(buf.getvalue(), media_type="text/csv", headers=headers)
    return EventPage(items=items, next_cursor=next_cursor)


_CSV_DOC = {"200": {"content": {"text/csv": {"schema": {"type": "string"}}}}}


@router.get("/v1/events", response_model=EventPage, responses=_CSV_DOC)  # type: ignore[arg-type]
def list_events(
    request: Request,
    session: ReadSessionDep,
    settings: SettingsDep,
    kind: KindQ = [],  # noqa: B006 - FastAPI copies query defaults
    severity: SeverityQ = [],  # noqa: B006
    phase: Annotated[int | None, Query(ge=0, le=63)] = None,
    since: TimeQ = None,
    until: TimeQ = None,
    cursor: Annotated[str | None, Query(max_length=20)] = None,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
) -> EventPage | Response:
    return _page(
        request, session, settings, rail_id=None, kind=kind, severity=severity, phase=phase,
        since=since, until=until, cursor=cursor, limit=limit,
    )  # fmt: skip


@router.get("/v1/rails/{rail_id}/events", response_model=EventPage, responses=_CSV_DOC)  # type: ignore[arg-type]
def list_rail_events(
    rail_id: RailId,
    request: Request,
    session: ReadSessionDep,
    settings: SettingsDep,
    kind: KindQ = [],  # noqa: B006
    severity: SeverityQ = [],  # noqa: B006
    phase: Annotated[int | None, Query(ge=0, le=63)] = None,
    since: TimeQ = None,
    until: TimeQ = None,
    cursor: Annotated[str | None, Query(max_length=20)] = None,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
) -> EventPage | Response:
    rail_service.get(session, rail_id)  # 404 for an unknown rail rather than an empty page
    return _page(
        request, session, settings, rail_id=rail_id, kind=kind, severity=severity, phase=phase,
        since=since, until=until, cursor=cursor, limit=limit,
    )  # fmt: skip


@router.post("/v1/events/{event_id}/ack")
def ack_event(event_id: int, body: AckIn, sessions: SessionsDep) -> EventOut:
    return EventOut.of(acknowledge(sessions, event_id, by=body.by, note=body.note))
