"""Rail definitions and their versions."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from sqlalchemy import bindparam, delete, select
from sqlalchemy.orm import Session

from phaseward.store.models import Rail, RailVersion


def get(session: Session, rail_id: str, *, for_update: bool = False) -> Rail | None:
    stmt = select(Rail).where(Rail.id == rail_id)
    if for_update:
        stmt = stmt.with_for_update()
    return session.scalars(stmt).one_or_none()


# Built once: building a statement cost several times executing it (store/state.py).
_VERSIONS = (
    select(Rail.id, Rail.version)
    .where(Rail.id.in_(bindparam("ids", expanding=True)))
    .order_by(Rail.id)
    .with_for_update()
)


def versions_for_update(session: Session, rail_ids: Sequence[str]) -> dict[str, int]:
    """The rails' current versions (a rail missing: no such rail), with their row locks
    (ingest's first step), taken in id order in one statement: two processes locking
    overlapping sets never wait on each other in a cycle."""
    found = session.connection().execute(_VERSIONS, {"ids": list(rail_ids)})
    return {rail_id: version for rail_id, version in found}


def list_page(
    session: Session, *, after: str | None, limit: int, allowed: frozenset[str] | None = None
) -> Sequence[Rail]:
    stmt = select(Rail).order_by(Rail.id).limit(limit)
    if allowed is not None:
        stmt = stmt.where(Rail.id.in_(allowed))
    if after is not None:
        stmt = stmt.where(Rail.id > after)
    return session.scalars(stmt).all()


def spec(session: Session, rail_id: str, version: int) -> dict[str, Any]:
    row = session.get_one(RailVersion, (rail_id, version))
    return row.spec


def specs(session: Session, rails: Sequence[Rail]) -> dict[str, dict[str, Any]]:
    """The current definition of each rail, in one query."""
    if not rails:
        return {}
    keys = [(r.id, r.version) for r in rails]
    stmt = select(RailVersion).where(RailVersion.rail_id.in_([k[0] for k in keys]))
    wanted = set(keys)
    return {v.rail_id: v.spec for v in session.scalars(stmt) if (v.rail_id, v.version) in wanted}


def add_version(
    session: Session, *, rail_id: str, spec: dict[str, Any], now_s: float, rail: Rail | None
) -> Rail:
    """Store a definition as the rail's next version (creating the rail if it is new)."""
    if rail is None:
        rail = Rail(id=rail_id, version=1, created_s=now_s, updated_s=now_s)
        session.add(rail)
    else:
        rail.version += 1
        rail.updated_s = now_s
    session.flush()
    session.add(RailVersion(rail_id=rail_id, version=rail.version, spec=spec, created_s=now_s))
    session.flush()
    return rail


def remove(session: Session, rail_id: str) -> None:
    session.execute(delete(Rail).where(Rail.id == rail_id))
