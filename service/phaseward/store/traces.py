"""Uploaded traces for rehearsals."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from sqlalchemy import select
from sqlalchemy.orm import Session

from phaseward.store.models import Trace

F64 = npt.NDArray[np.float64]


@dataclass(frozen=True)
class TraceArrays:
    """t_s, vin_v: (n,); current_a, temp_c: (n, n_phases), NaN = not reported; isolated:
    (n, n_phases) bool, the phases the recording reports isolated (breaker tripped or driver
    disabled)."""

    name: str
    t_s: F64
    vin_v: F64
    current_a: F64
    temp_c: F64
    isolated: npt.NDArray[np.bool_]


def add(session: Session, trace: TraceArrays, *, now_s: float) -> int:
    n, p = trace.current_a.shape
    row = Trace(
        name=trace.name,
        n_samples=n,
        n_phases=p,
        t_s=np.ascontiguousarray(trace.t_s, "<f8").tobytes(),
        vin_v=np.ascontiguousarray(trace.vin_v, "<f8").tobytes(),
        current_a=np.ascontiguousarray(trace.current_a, "<f8").tobytes(),
        temp_c=np.ascontiguousarray(trace.temp_c, "<f8").tobytes(),
        isolated=np.ascontiguousarray(trace.isolated, "u1").tobytes(),
        created_s=now_s,
    )
    session.add(row)
    session.flush()
    return row.id


def get(session: Session, trace_id: int) -> TraceArrays | None:
    row = session.get(Trace, trace_id)
    if row is None:
        return None
    shape = (row.n_samples, row.n_phases)

    def arr(blob: bytes) -> F64:
        return np.frombuffer(blob, dtype="<f8").astype(np.float64)

    return TraceArrays(
        name=row.name,
        t_s=arr(row.t_s),
        vin_v=arr(row.vin_v),
        current_a=arr(row.current_a).reshape(shape),
        temp_c=arr(row.temp_c).reshape(shape),
        isolated=(
            np.zeros(shape, dtype=bool)
            if row.isolated is None
            else np.frombuffer(row.isolated, dtype="u1").reshape(shape).astype(bool)
        ),
    )


def shape(session: Session, trace_id: int) -> tuple[int, int] | None:
    """(n_samples, n_phases) of a stored trace, without reading its arrays; None if absent."""
    row = session.execute(
        select(Trace.n_samples, Trace.n_phases).where(Trace.id == trace_id)
    ).first()
    return None if row is None else (int(row[0]), int(row[1]))
