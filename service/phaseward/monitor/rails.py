"""Rail definitions: create, version, delete. Each definition is checked by building its
physics model and reviewing it (:mod:`sanity`) before it is stored, so a stored rail can
always be judged; the review's warnings come back with the stored rail."""

from __future__ import annotations

import time
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import Conflict, NotFound
from phaseward.monitor.sanity import Notice, review
from phaseward.store import rails
from phaseward.store.db import transaction
from phaseward.store.models import Rail


def create(
    sessions: sessionmaker[Session], rail_id: str, spec: dict[str, Any]
) -> tuple[Rail, dict[str, Any], list[Notice]]:
    _, warnings = review(rail_id, spec)
    with transaction(sessions) as session:
        if rails.get(session, rail_id) is not None:
            raise Conflict(f"rail '{rail_id}' exists already; PUT a new version", field="id")
        rail = rails.add_version(session, rail_id=rail_id, spec=spec, now_s=time.time(), rail=None)
    return rail, spec, warnings


def put_version(
    sessions: sessionmaker[Session], rail_id: str, spec: dict[str, Any]
) -> tuple[Rail, dict[str, Any], bool, list[Notice]]:
    """Store ``spec`` as the next version (or the first, creating the rail). Returns created."""
    _, warnings = review(rail_id, spec)
    with transaction(sessions) as session:
        existing = rails.get(session, rail_id, for_update=True)
        rail = rails.add_version(
            session, rail_id=rail_id, spec=spec, now_s=time.time(), rail=existing
        )
    return rail, spec, existing is None, warnings


def delete(sessions: sessionmaker[Session], rail_id: str) -> None:
    with transaction(sessions) as session:
        if rails.get(session, rail_id) is None:
            raise NotFound(f"no rail '{rail_id}'", field="rail_id")
        rails.remove(session, rail_id)


def get(session: Session, rail_id: str) -> tuple[Rail, dict[str, Any]]:
    rail = rails.get(session, rail_id)
    if rail is None:
        raise NotFound(f"no rail '{rail_id}'", field="rail_id")
    return rail, rails.spec(session, rail.id, rail.version)
