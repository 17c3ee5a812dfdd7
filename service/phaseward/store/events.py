"""Derived events: append, filter with a cursor, acknowledge."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, insert, select
from sqlalchemy.orm import Session

from phaseward.store.models import Event


@dataclass(frozen=True)
class EventFilter:
    rail_id: str | None = None
    kinds: tuple[str, ...] = ()
    severities: tuple[str, ...] = ()
    phase: int | None = None
    since_s: float | None = None
    until_s: float | None = None
    allowed_rails: frozenset[str] | None = None  # None: every rail


def add_many(session: Session, rows: list[dict[str, Any]]) -> None:
    if rows:
        session.execute(insert(Event), rows)


def page(
    session: Session, flt: EventFilter, *, before_id: int | None, limit: int
) -> Sequence[Event]:
    """Newest first; ``before_id`` is the cursor (ids only grow, so it is stable under inserts)."""
    stmt = select(Event).order_by(Event.id.desc()).limit(limit)
    if flt.allowed_rails is not None:
        stmt = stmt.where(Event.rail_id.in_(flt.allowed_rails))
    if flt.rail_id is not None:
        stmt = stmt.where(Event.rail_id == flt.rail_id)
    if flt.kinds:
        stmt = stmt.where(Event.kind.in_(flt.kinds))
    if flt.severities:
        stmt = stmt.where(Event.severity.in_(flt.severities))
    if flt.phase is not None:
        stmt = stmt.where(Event.phase == flt.phase)
    if flt.since_s is not None:
        stmt = stmt.where(Event.t_s >= flt.since_s)
    if flt.until_s is not None:
        stmt = stmt.where(Event.t_s < flt.until_s)
    if before_id is not None:
        stmt = stmt.where(Event.id < before_id)
    return session.scalars(stmt).all()


def newest_of_kind(session: Session, rail_id: str, kind: str) -> Event | None:
    """The rail's newest event of ``kind``, locked for update where the database can."""
    stmt = (
        select(Event)
        .where(Event.rail_id == rail_id, Event.kind == kind)
        .order_by(Event.id.desc())
        .limit(1)
        .with_for_update()
    )
    return session.scalars(stmt).one_or_none()


def get(session: Session, event_id: int) -> Event | None:
    return session.get(Event, event_id)


def attach_signature(
    session: Session, *, rail_id: str, phase: int, t_s: float, signature: dict[str, Any]
) -> None:
    """Add the fault class to the ``phase.isolated`` event of ``phase`` at ``t_s``."""
    stmt = select(Event).where(
        Event.rail_id == rail_id,
        Event.kind == "phase.isolated",
        Event.phase == phase,
        Event.t_s == t_s,
    )
    for event in session.scalars(stmt):
        event.details = {**event.details, "signature": signature}


def after(session: Session, flt: EventFilter, *, after_id: int, limit: int) -> Sequence[Event]:
    """Events newer than ``after_id``, oldest first (for live streams)."""
    stmt = select(Event).where(Event.id > after_id).order_by(Event.id).limit(limit)
    if flt.allowed_rails is not None:
        stmt = stmt.where(Event.rail_id.in_(flt.allowed_rails))
    if flt.rail_id is not None:
        stmt = stmt.where(Event.rail_id == flt.rail_id)
    if flt.kinds:
        stmt = stmt.where(Event.kind.in_(flt.kinds))
    return session.scalars(stmt).all()


def latest_id(session: Session) -> int:
    return session.scalar(select(func.max(Event.id))) or 0
