"""Access keys and roles.

Roles: ``ingest`` posts samples; ``read`` reads rails, status, samples and events; ``operate``
reads, acknowledges events and runs analyses, rehearsals and calibrations; ``admin`` may do
everything, including defining rails. A key may be limited to chosen rails. Keys are random,
shown once at creation, stored only as digests, and compared in constant time.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
import time
from dataclasses import dataclass

from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import NotFound
from phaseward.store import keys
from phaseward.store.db import transaction
from phaseward.store.models import ApiKey

ROLES = ("ingest", "read", "operate", "admin")
# What each role may do: a request needing role R is allowed to keys whose role grants R.
GRANTS: dict[str, frozenset[str]] = {
    "ingest": frozenset({"ingest"}),
    "read": frozenset({"read"}),
    "operate": frozenset({"read", "operate"}),
    "admin": frozenset(ROLES),
}
KEY_PREFIX = "pwk_"
PREFIX_CHARS = 12  # the stored, non-secret start of a key used to find it


@dataclass(frozen=True)
class Principal:
    """Who is asking: a key's id, name, role and rails (None: every rail)."""

    key_id: int | None
    name: str
    role: str
    rails: frozenset[str] | None

    def grants(self, needed: str) -> bool:
        return needed in GRANTS[self.role]

    def may_use(self, rail_id: str) -> bool:
        return self.rails is None or rail_id in self.rails


OPEN = Principal(key_id=None, name="open mode", role="admin", rails=None)


def _digest(key: str) -> str:
    return hashlib.sha256(key.encode()).hexdigest()


def create(
    sessions: sessionmaker[Session], *, name: str, role: str, rails: list[str] | None
) -> tuple[ApiKey, str]:
    """A new key; the plain key is returned here once and never stored."""
    if role not in ROLES:
        raise ValueError(f"role must be one of {', '.join(ROLES)}")
    plain = KEY_PREFIX + secrets.token_urlsafe(30)
    with transaction(sessions) as session:
        row = keys.add(
            session, name=name, role=role, prefix=plain[:PREFIX_CHARS], digest=_digest(plain),
            rails=sorted(set(rails)) if rails else None, now_s=time.time(),
        )  # fmt: skip
    return row, plain


def authenticate(session: Session, plain: str) -> Principal | None:
    digest = _digest(plain)
    found = None
    for row in keys.by_prefix(session, plain[:PREFIX_CHARS]):
        if hmac.compare_digest(row.digest, digest):
            found = row
    if found is None:
        return None
    rails = None if found.rails is None else frozenset(found.rails)
    return Principal(key_id=found.id, name=found.name, role=found.role, rails=rails)


def revoke(sessions: sessionmaker[Session], key_id: int) -> ApiKey:
    with transaction(sessions) as session:
        row = keys.get(session, key_id)
        if row is None:
            raise NotFound(f"no key {key_id}", field="key_id")
        if row.revoked_s is None:
            row.revoked_s = time.time()
    return row


def listing(sessions: sessionmaker[Session]) -> list[ApiKey]:
    with sessions() as session:
        return list(keys.all_keys(session))
