"""Rail definitions: create, version, delete. Each definition is checked by building its
physics model before it is stored, so a stored rail can always be judged."""

from __future__ import annotations

import time
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import Conflict, InvalidInput, NotFound
from phaseward.monitor import rail_model
from phaseward.store import rails
from phaseward.store.db import transaction
from phaseward.store.models import Rail


def _check_buildable(rail_id: str, spec: dict[str, Any]) -> None:
    try:
        rail_model.build(rail_id, 0, spec)
    except ValueError as err:  # physics names the argument it refused
        raise InvalidInput(f"the definition cannot be modelled: {err}", field="phase") from err


def create(
    sessions: sessionmaker[Session], rail_id: str, spec: dict[str, Any]
) -> tuple[Rail, dict[str, Any]]:
    _check_buildable(rail_id, spec)
    with transaction(sessions) as session:
        if rails.get(session, rail_id) is not None:
            raise Conflict(f"rail '{rail_id}' exists already; PUT a new version", field="id")
        rail = rails.add_version(session, rail_id=rail_id, spec=spec, now_s=time.time(), rail=None)
    return rail, spec


def put_version(
    sessions: sessionmaker[Session], rail_id: str, spec: dict[str, Any]
) -> tuple[Rail, dict[str, Any], bool]:
    """Store ``spec`` as the next version (or the first, creating the rail). Returns created."""
    _check_buildable(rail_id, spec)
    with transaction(sessions) as session:
        existing = rails.get(session, rail_id, for_update=True)
        rail = rails.add_version(
            session, rail_id=rail_id, spec=spec, now_s=time.time(), rail=existing
        )
    return rail, spec, existing is None


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
