"""Operators acknowledge events; the record says who, when, and why."""

from __future__ import annotations

import time
from collections.abc import Callable

from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import Conflict, NotFound
from phaseward.store import events
from phaseward.store.db import transaction
from phaseward.store.models import Event


def acknowledge(
    sessions: sessionmaker[Session],
    event_id: int,
    *,
    by: str,
    note: str | None,
    key_name: str,
    may_use: Callable[[str], bool],
) -> Event:
    """Record who acknowledged the event (as they say, and the name of the key they used),
    when, and why; ``may_use`` says which rails the caller may touch (an event of another
    rail answers as unknown, revealing nothing of it)."""
    with transaction(sessions) as session:
        event = events.get(session, event_id)
        if event is None or not may_use(event.rail_id):
            raise NotFound(f"no event {event_id}", field="event_id")
        if event.acked_by is not None:
            raise Conflict(
                f"event {event_id} was acknowledged by {event.acked_by} already", field="event_id"
            )
        event.acked_by, event.ack_note, event.acked_s = by, note, time.time()
        event.acked_key = key_name
    return event
