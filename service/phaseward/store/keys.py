"""Access keys."""

from __future__ import annotations

from collections.abc import Sequence

from sqlalchemy import select
from sqlalchemy.orm import Session

from phaseward.store.models import ApiKey


def add(
    session: Session, *, name: str, role: str, prefix: str, digest: str,
    rails: list[str] | None, now_s: float,
) -> ApiKey:  # fmt: skip
    key = ApiKey(name=name, role=role, prefix=prefix, digest=digest, rails=rails, created_s=now_s)
    session.add(key)
    session.flush()
    return key


def by_prefix(session: Session, prefix: str) -> Sequence[ApiKey]:
    stmt = select(ApiKey).where(ApiKey.prefix == prefix, ApiKey.revoked_s.is_(None))
    return session.scalars(stmt).all()


def all_keys(session: Session) -> Sequence[ApiKey]:
    return session.scalars(select(ApiKey).order_by(ApiKey.id)).all()


def get(session: Session, key_id: int) -> ApiKey | None:
    return session.get(ApiKey, key_id)
