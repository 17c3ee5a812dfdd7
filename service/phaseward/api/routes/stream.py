"""Live events as Server-Sent Events, resumable from the last event id.

The stream polls the events table, so every replica of the service serves the same stream
from the shared database. It hands events out in the order they became final (on PostgreSQL
that is not id order: ``store.events.stream_after``), and ``Last-Event-ID`` resumes just past
the named event, so no event is skipped or sent twice.
"""

from __future__ import annotations

import asyncio
import json
from collections.abc import AsyncIterator
from typing import Annotated

from fastapi import APIRouter, Header, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import StreamingResponse
from sqlalchemy.orm import Session, sessionmaker

from phaseward.api.auth import Reader
from phaseward.api.deps import ReadSessionsDep
from phaseward.api.errors import ERROR_RESPONSES
from phaseward.api.schemas.common import MAX_ROW_ID, is_row_id
from phaseward.api.schemas.events import EventOut
from phaseward.errors import InvalidInput
from phaseward.store import events as event_store

router = APIRouter(tags=["events"], responses=ERROR_RESPONSES)
POLL_S = 0.5
HEARTBEAT_S = 15.0


def _newer(
    sessions: sessionmaker[Session], flt: event_store.EventFilter, after: event_store.Position
) -> list[tuple[event_store.Position, EventOut]]:
    with sessions() as session, session.begin():
        rows = event_store.stream_after(session, flt, after=after, limit=500)
        return [((e.txid, e.id), EventOut.of(e)) for e in rows]


def _start(sessions: sessionmaker[Session], after: int | None) -> event_store.Position:
    with sessions() as session, session.begin():
        if after is None:
            return event_store.position_now(session)
        return event_store.position_after(session, after)


# One frame of the stream (OpenAPI 3.1 has a stream's schema describe each event): the event
# id, its kind, and the event as JSON, as GET /v1/events lists it; the first frame sets retry.
_EVENT_FRAME = {
    "type": "object",
    "properties": {
        "id": {"type": "string"},
        "event": {"type": "string"},
        "data": {
            "type": "string",
            "contentMediaType": "application/json",
            "contentSchema": {"$ref": "#/components/schemas/EventOut"},
        },
        "retry": {"type": "integer"},
    },
}


@router.get(
    "/v1/events/stream",
    response_class=StreamingResponse,
    responses={200: {"content": {"text/event-stream": {"schema": _EVENT_FRAME}}}},
)
async def stream_events(
    request: Request,
    sessions: ReadSessionsDep,
    who: Reader,
    rail_id: Annotated[str | None, Query(max_length=64)] = None,
    kind: Annotated[list[str], Query(max_length=20)] = [],  # noqa: B006 - copied by FastAPI
    after: Annotated[
        int | None, Query(ge=0, le=MAX_ROW_ID, description="resume after this event id")
    ] = None,
    limit: Annotated[int | None, Query(ge=1, le=100_000, description="end after N events")] = None,
    last_event_id: Annotated[str | None, Header()] = None,
) -> StreamingResponse:
    """Events as they are derived, oldest first. Without ``after`` or ``Last-Event-ID`` the
    stream starts with the next new event."""
    if last_event_id is not None and not is_row_id(last_event_id):
        raise InvalidInput("Last-Event-ID must be an event id", field="last-event-id")
    after = int(last_event_id) if last_event_id is not None else after
    start = await run_in_threadpool(_start, sessions, after)
    flt = event_store.EventFilter(rail_id=rail_id, kinds=tuple(kind), allowed_rails=who.rails)

    async def frames() -> AsyncIterator[str]:
        last, sent, idle = start, 0, 0.0
        yield "retry: 2000\n\n"
        while limit is None or sent < limit:
            if await request.is_disconnected():
                return
            batch = await run_in_threadpool(_newer, sessions, flt, last)
            for position, event in batch[: None if limit is None else limit - sent]:
                body = json.dumps(event.model_dump(), separators=(",", ":"))
                yield f"id: {event.id}\nevent: {event.kind}\ndata: {body}\n\n"
                last, sent, idle = position, sent + 1, 0.0
            if not batch:
                idle += POLL_S
                if idle >= HEARTBEAT_S:
                    idle = 0.0
                    yield ": still here\n\n"
                await asyncio.sleep(POLL_S)

    return StreamingResponse(
        frames(), media_type="text/event-stream", headers={"Cache-Control": "no-cache"}
    )
