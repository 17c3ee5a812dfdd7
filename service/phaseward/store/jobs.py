"""Background jobs: queued, running, done or failed, with their progress, result and lease."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from sqlalchemy import or_, select, update
from sqlalchemy.orm import Session

from phaseward.store.models import Job

UNFINISHED = ("queued", "running")


def add(
    session: Session, *, kind: str, request: dict[str, Any], now_s: float, owner: str,
    lease_until_s: float,
) -> Job:  # fmt: skip
    job = Job(kind=kind, status="queued", percent=0.0, request=request, created_s=now_s,
              lease_owner=owner, lease_until_s=lease_until_s)  # fmt: skip
    session.add(job)
    session.flush()
    return job


def get(session: Session, job_id: int) -> Job | None:
    return session.get(Job, job_id)


def claim(session: Session, job_id: int, *, owner: str, now_s: float, until_s: float) -> Job | None:
    """Take the lease of an unfinished job that ``owner`` holds already or whose lease has
    expired; None if another server holds it (or it is finished). On PostgreSQL the row is
    locked with SKIP LOCKED, so two servers claiming at once never both get it; SQLite runs
    one writing transaction at a time."""
    stmt = (
        select(Job)
        .where(
            Job.id == job_id,
            Job.status.in_(UNFINISHED),
            or_(Job.lease_owner == owner, Job.lease_until_s.is_(None), Job.lease_until_s < now_s),
        )
        .with_for_update(skip_locked=True)
    )
    job = session.scalars(stmt).first()
    if job is not None:
        job.lease_owner, job.lease_until_s = owner, until_s
    return job


def orphans(session: Session, *, now_s: float) -> Sequence[int]:
    """Unfinished jobs whose lease has expired (their server stopped) or that never had one."""
    stmt = (
        select(Job.id)
        .where(
            Job.status.in_(UNFINISHED),
            or_(Job.lease_until_s.is_(None), Job.lease_until_s < now_s),
        )
        .order_by(Job.id)
    )
    return session.scalars(stmt).all()


def renew(session: Session, *, owner: str, until_s: float) -> None:
    """Extend every lease ``owner`` holds on an unfinished job."""
    session.execute(
        update(Job)
        .where(Job.lease_owner == owner, Job.status.in_(UNFINISHED))
        .values(lease_until_s=until_s)
    )


def set_progress(session: Session, job_id: int, *, owner: str, status: str, percent: float) -> None:
    """Progress of a job ``owner`` still holds (a server that lost the lease writes nothing)."""
    session.execute(
        update(Job)
        .where(Job.id == job_id, Job.lease_owner == owner)
        .values(status=status, percent=percent)
    )


def finish(
    session: Session,
    job_id: int,
    *,
    owner: str,
    result: dict[str, Any] | None,
    error: str | None,
    now_s: float,
) -> None:
    session.execute(
        update(Job)
        .where(Job.id == job_id, Job.lease_owner == owner)
        .values(
            status="failed" if error else "done",
            percent=100.0,
            result=result,
            error=error,
            finished_s=now_s,
            lease_until_s=None,
        )
    )
