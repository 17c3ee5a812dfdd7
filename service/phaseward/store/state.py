"""The live per-rail state row."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from phaseward.store.models import RailState


def get(session: Session, rail_id: str, *, for_update: bool = False) -> RailState | None:
    """Read the state; ``for_update`` takes the row lock on PostgreSQL (SQLite's BEGIN
    IMMEDIATE already serialises writers) so concurrent ingest never interleaves updates."""
    stmt = select(RailState).where(RailState.rail_id == rail_id)
    if for_update:
        stmt = stmt.with_for_update()
    return session.scalars(stmt).one_or_none()


def put(
    session: Session,
    *,
    rail_id: str,
    version: int,
    last_seq: int | None,
    last_t_s: float | None,
    state: dict[str, Any],
    now_s: float,
) -> None:
    row = session.get(RailState, rail_id)
    if row is None:
        row = RailState(rail_id=rail_id)
        session.add(row)
    row.version = version
    row.last_seq = last_seq
    row.last_t_s = last_t_s
    row.state = state
    row.updated_s = now_s


def all_states(session: Session) -> Sequence[RailState]:
    return session.scalars(select(RailState).order_by(RailState.rail_id)).all()
