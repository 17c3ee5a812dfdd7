"""Derived events: append, filter with a cursor, acknowledge."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, insert, select, tuple_
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


Position = tuple[int, int]
"""Where a live stream stands: (txid, id) of the last event handed out (see ``stream_after``)."""


def _commit_ordered(session: Session) -> bool:
    return session.get_bind().dialect.name == "postgresql"


def _horizon() -> Any:
    """The oldest transaction still in flight for this statement's snapshot: every
    transaction with a smaller id has finished, so its rows are all visible or gone for good."""
    return func.txid_snapshot_xmin(func.txid_current_snapshot())


def stream_after(
    session: Session, flt: EventFilter, *, after: Position, limit: int
) -> Sequence[Event]:
    """Events past ``after`` for a live stream, in the order they became final.

    Ids are drawn at insert, and on PostgreSQL transactions for different rails commit out of
    id order: asking for ``id > last sent`` skips an id that commits after a higher one. So
    each event records the id of the transaction that wrote it (``txid``), the stream hands
    out only events of transactions older than every one still in flight, ordered by
    ``(txid, id)``: an event that becomes visible later always sorts after everything handed
    out already. The price: a long write transaction anywhere on the database server (a
    retention pass, say) holds the stream back until it ends; it delays, never skips. On
    SQLite one writer runs at a time, so id order is commit order (txid 0)."""
    if _commit_ordered(session):
        stmt = select(Event).where(
            tuple_(Event.txid, Event.id) > tuple_(*after), Event.txid < _horizon()
        )
        stmt = stmt.order_by(Event.txid, Event.id)
    else:
        stmt = select(Event).where(Event.id > after[1]).order_by(Event.id)
    stmt = stmt.limit(limit)
    if flt.allowed_rails is not None:
        stmt = stmt.where(Event.rail_id.in_(flt.allowed_rails))
    if flt.rail_id is not None:
        stmt = stmt.where(Event.rail_id == flt.rail_id)
    if flt.kinds:
        stmt = stmt.where(Event.kind.in_(flt.kinds))
    return session.scalars(stmt).all()


def position_after(session: Session, event_id: int) -> Position:
    """The stream position just past event ``event_id`` (a Last-Event-ID).

    For an id not stored (0, say) the stream starts at the oldest transaction that wrote a
    higher id, visible now or still in flight: an event may come twice then, but none is
    skipped."""
    if not _commit_ordered(session):
        return (0, event_id)
    txid = session.scalar(select(Event.txid).where(Event.id == event_id))
    if txid is not None:
        return (txid, event_id)
    later = select(func.min(Event.txid)).where(Event.id > event_id).scalar_subquery()
    return (session.execute(select(func.least(later, _horizon()))).scalar_one(), 0)


def position_now(session: Session) -> Position:
    """The position of the newest event a stream could hand out now."""
    if not _commit_ordered(session):
        return (0, session.scalar(select(func.max(Event.id))) or 0)
    newest = session.execute(
        select(Event.txid, Event.id)
        .where(Event.txid < _horizon())
        .order_by(Event.txid.desc(), Event.id.desc())
        .limit(1)
    ).first()
    return (0, 0) if newest is None else (newest[0], newest[1])
