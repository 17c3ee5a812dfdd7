"""Events: filtered, newest first, cursor pages, JSON or CSV; acknowledgement."""

from __future__ import annotations

import csv
import io
import math
from datetime import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Query, Request
from fastapi.responses import Response
from pydantic import BaseModel, Field, StringConstraints

from phaseward.api.auth import Operator, RailReader, Reader
from phaseward.api.deps import ReadSessionDep, SessionsDep, SettingsDep
from phaseward.api.errors import ERROR_RESPONSES
from phaseward.api.routes.rails import RailId, RowId
from phaseward.api.schemas.common import is_row_id
from phaseward.api.schemas.events import (
    CSV_COLUMNS,
    SEVERITIES,
    AckIn,
    EventOut,
    EventPage,
    csv_cell,
)
from phaseward.errors import InvalidInput
from phaseward.monitor import rails as rail_service
from phaseward.monitor.acknowledge import acknowledge
from phaseward.store import events as event_store

router = APIRouter(tags=["events"], responses=ERROR_RESPONSES)


class EventQuery(BaseModel):
    """Filters and paging shared by both event lists."""

    # An event kind looks like ``phase.isolated``: anything else (a NUL byte answered 500 on
    # PostgreSQL, found by the schema fuzz) is refused with 422 naming ``kind``.
    kind: list[Annotated[str, StringConstraints(pattern=r"^[a-z][a-z0-9_.]{0,63}$")]] = Field(
        default_factory=list, max_length=20, description="repeatable"
    )
    severity: list[str] = Field(
        default_factory=list, max_length=3, description="info, warning, critical"
    )
    phase: int | None = Field(default=None, ge=0, le=63)
    since: str | None = Field(default=None, max_length=40, description="RFC 3339 or epoch seconds")
    until: str | None = Field(default=None, max_length=40, description="RFC 3339 or epoch seconds")
    cursor: str | None = Field(default=None, max_length=20, description="next_cursor of a page")
    limit: int = Field(default=100, ge=1, le=1000)


EventQueryDep = Annotated[EventQuery, Query()]


def _time(value: str | None, name: str) -> float | None:
    if value is None:
        return None
    try:
        epoch_s = float(value)
    except ValueError:
        pass
    else:
        if not math.isfinite(epoch_s):
            raise InvalidInput(f"{name} must be a finite time", field=name)
        return epoch_s
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
    query: EventQuery,
    allowed: frozenset[str] | None,
) -> EventPage | Response:
    for level in query.severity:
        if level not in SEVERITIES:
            raise InvalidInput(f"unknown severity '{level}'", field="severity")
    cursor = query.cursor
    if cursor is not None and not is_row_id(cursor):
        raise InvalidInput("cursor must be the next_cursor of a previous page", field="cursor")
    flt = event_store.EventFilter(
        allowed_rails=allowed, rail_id=rail_id, kinds=tuple(query.kind),
        severities=tuple(query.severity), phase=query.phase,
        since_s=_time(query.since, "since"), until_s=_time(query.until, "until"),
    )  # fmt: skip
    size = min(query.limit, settings.max_page_size)
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
            writer.writerow([csv_cell(getattr(e, c)) for c in CSV_COLUMNS])
        headers = {"X-Next-Cursor": next_cursor} if next_cursor else {}
        return Response(buf.getvalue(), media_type="text/csv", headers=headers)
    return EventPage(items=items, next_cursor=next_cursor)


_CSV_DOC: dict[int | str, dict[str, Any]] = {
    "200": {"content": {"text/csv": {"schema": {"type": "string"}}}}
}


@router.get("/v1/events", response_model=EventPage, responses=_CSV_DOC)
def list_events(
    request: Request,
    session: ReadSessionDep,
    settings: SettingsDep,
    query: EventQueryDep,
    who: Reader,
) -> EventPage | Response:
    return _page(request, session, settings, rail_id=None, query=query, allowed=who.rails)


@router.get("/v1/rails/{rail_id}/events", response_model=EventPage, responses=_CSV_DOC)
def list_rail_events(
    rail_id: RailId,
    request: Request,
    session: ReadSessionDep,
    settings: SettingsDep,
    query: EventQueryDep,
    _: RailReader,
) -> EventPage | Response:
    rail_service.get(session, rail_id)  # 404 for an unknown rail rather than an empty page
    return _page(request, session, settings, rail_id=rail_id, query=query, allowed=None)


@router.post("/v1/events/{event_id}/ack")
def ack_event(event_id: RowId, body: AckIn, sessions: SessionsDep, who: Operator) -> EventOut:
    event = acknowledge(
        sessions, event_id, by=body.by, note=body.note, key_name=who.name, may_use=who.may_use
    )
    return EventOut.of(event)
