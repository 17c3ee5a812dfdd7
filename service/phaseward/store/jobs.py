"""Background jobs: queued, running, done or failed, with their progress and result."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from phaseward.store.models import Job


def add(session: Session, *, kind: str, request: dict[str, Any], now_s: float) -> Job:
    job = Job(kind=kind, status="queued", percent=0.0, request=request, created_s=now_s)
    session.add(job)
    session.flush()
    return job


def get(session: Session, job_id: int) -> Job | None:
    return session.get(Job, job_id)


def set_progress(session: Session, job_id: int, *, status: str, percent: float) -> None:
    session.execute(update(Job).where(Job.id == job_id).values(status=status, percent=percent))


def finish(
    session: Session,
    job_id: int,
    *,
    result: dict[str, Any] | None,
    error: str | None,
    now_s: float,
) -> None:
    session.execute(
        update(Job)
        .where(Job.id == job_id)
        .values(
            status="failed" if error else "done",
            percent=100.0,
            result=result,
            error=error,
            finished_s=now_s,
        )
    )


def unfinished(session: Session) -> Sequence[int]:
    """Jobs a stopped process left queued or running."""
    stmt = select(Job.id).where(Job.status.in_(("queued", "running"))).order_by(Job.id)
    return session.scalars(stmt).all()
