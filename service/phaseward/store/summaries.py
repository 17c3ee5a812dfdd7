"""Reduced history: per-interval minimum, maximum and mean of samples past retention."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from phaseward.store.models import Sample, SampleSummary


def in_range(
    session: Session, rail_id: str, *, start_s: float, end_s: float
) -> Sequence[SampleSummary]:
    stmt = (
        select(SampleSummary)
        .where(
            SampleSummary.rail_id == rail_id,
            SampleSummary.t_start_s >= start_s,
            SampleSummary.t_start_s < end_s,
        )
        .order_by(SampleSummary.t_start_s)
    )
    return session.scalars(stmt).all()


def put(session: Session, row: dict[str, Any]) -> None:
    """Insert or replace the summary of one rail and interval."""
    existing = session.get(SampleSummary, (row["rail_id"], row["t_start_s"]))
    if existing is None:
        session.add(SampleSummary(**row))
    else:
        for key, value in row.items():
            setattr(existing, key, value)


def oldest_sample_s(session: Session, rail_id: str) -> float | None:
    stmt = select(Sample.t_s).where(Sample.rail_id == rail_id).order_by(Sample.t_s).limit(1)
    return session.scalars(stmt).first()


def delete_samples_before(session: Session, rail_id: str, *, end_s: float) -> int:
    result = session.execute(delete(Sample).where(Sample.rail_id == rail_id, Sample.t_s < end_s))
    return int(getattr(result, "rowcount", 0) or 0)
