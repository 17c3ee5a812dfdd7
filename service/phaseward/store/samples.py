"""Telemetry samples: bulk insert with resend detection, and time windows as numpy arrays."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, cast

import numpy as np
import numpy.typing as npt
from sqlalchemy import BindParameter, Row, bindparam, func, insert, select
from sqlalchemy.orm import Session

from phaseward.store.models import RailState, Sample

F64 = npt.NDArray[np.float64]


@dataclass(frozen=True)
class SampleRows:
    """Samples of one rail as arrays: per-sample (n,), per-phase (n, n_phases).

    A window may span definition versions with different phase counts: per-phase arrays are
    then as wide as the widest version, phase k in column k, and a sample of a version with
    fewer phases has NaN (flags 0) beyond its own ``phase_count``."""

    seq: npt.NDArray[np.int64]
    t_s: F64
    version: npt.NDArray[np.int64]
    phase_count: npt.NDArray[np.int64]
    vin_v: F64
    vout_v: F64
    iout_a: F64
    ambient_c: F64
    iin_a: F64
    current_a: F64
    temp_c: F64
    flags: npt.NDArray[np.uint8]


def pack(values: npt.NDArray[Any], dtype: str) -> bytes:
    return np.ascontiguousarray(values, dtype=dtype).tobytes()


_STORED = [c for c in Sample.__table__.c if c.name not in ("id", "rail_id", "version")]
# The statements of the ingest path, built once (building one cost several times executing
# it: store/state.py).
_RAIL: BindParameter[str] = bindparam("rail_id")
_EXISTING = select(*_STORED).where(
    Sample.rail_id == _RAIL, Sample.seq.in_(bindparam("seqs", expanding=True))
)
_NEWER = (
    select(*_STORED)
    .where(Sample.rail_id == _RAIL, Sample.t_s > bindparam("t_s"), Sample.version == bindparam("v"))
    .order_by(Sample.t_s, Sample.seq)
)
_HIGHEST = select(func.max(Sample.seq)).where(Sample.rail_id == _RAIL)
_INSERT = insert(Sample)


def existing(session: Session, rail_id: str, seqs: Sequence[int]) -> dict[int, Row[Any]]:
    """The stored samples of these seqs, as rows with the sample's columns as attributes (not
    ORM objects: ingest asks on every request, and building entities cost more than the
    query)."""
    found: dict[int, Row[Any]] = {}
    conn = session.connection()
    for start in range(0, len(seqs), 500):  # stay under bound-parameter limits
        chunk = list(seqs[start : start + 500])
        rows = conn.execute(_EXISTING, {"rail_id": rail_id, "seqs": chunk})
        found.update((row.seq, row) for row in rows)
    return found


def newer_than(session: Session, rail_id: str, *, t_s: float, version: int) -> list[Row[Any]]:
    """The rail's stored samples of ``version`` dated after ``t_s``, oldest first (one range
    scan of the rail's time index): those not judged yet, when ``t_s`` is the live state's."""
    params = {"rail_id": rail_id, "t_s": t_s, "v": version}
    return list(session.connection().execute(_NEWER, params))


def rails_not_judged(session: Session) -> list[str]:
    """Rails with samples of their live state's version stored after it: samples that waited
    to be judged when the server stopped (one index probe per rail)."""
    later = select(Sample.seq).where(
        Sample.rail_id == RailState.rail_id,
        Sample.version == RailState.version,
        Sample.t_s > RailState.last_t_s,
    )
    stmt = select(RailState.rail_id).where(later.exists()).order_by(RailState.rail_id)
    return list(session.scalars(stmt))


def highest_seq(session: Session, rail_id: str) -> int:
    """The rail's highest stored seq (-1 when none): one probe of the (rail, seq) key per
    partition, asked once per rail and process (:mod:`phaseward.monitor.resident`)."""
    found = session.connection().execute(_HIGHEST, {"rail_id": rail_id}).scalar()
    return -1 if found is None else int(found)


def insert_rows(session: Session, rows: list[dict[str, Any]]) -> None:
    """A Core executemany on the session's connection (the ORM's bulk path cost more than the
    insert on the ingest path)."""
    if rows:
        session.connection().execute(_INSERT, rows)


def count(session: Session, rail_id: str) -> int:
    return session.scalar(select(func.count()).where(Sample.rail_id == rail_id)) or 0


def around(session: Session, rail_id: str, *, t_s: float, before: int, after: int) -> SampleRows:
    """Up to ``before`` samples older than ``t_s``, the one at ``t_s``, and up to ``after``
    newer ones, oldest first (two index range scans)."""
    older = (
        select(Sample.t_s)
        .where(Sample.rail_id == rail_id, Sample.t_s < t_s)
        .order_by(Sample.t_s.desc())
        .limit(before)
    )
    first = min(session.scalars(older).all(), default=t_s)
    newer = (
        select(Sample.t_s)
        .where(Sample.rail_id == rail_id, Sample.t_s > t_s)
        .order_by(Sample.t_s)
        .limit(after)
    )
    last = max(session.scalars(newer).all(), default=t_s)
    return window(
        session, rail_id, start_s=first, end_s=np.nextafter(last, np.inf), limit=before + after + 1
    )


def window_makeup(
    session: Session, rail_id: str, *, start_s: float, end_s: float
) -> list[tuple[int, int, int]]:
    """(phase count, definition version, samples) of the samples with start_s <= t < end_s:
    what a replay of the window must agree on, without loading it."""
    phases = func.length(Sample.flags)  # one flag byte a phase
    stmt = (
        select(phases, Sample.version, func.count())
        .where(Sample.rail_id == rail_id, Sample.t_s >= start_s, Sample.t_s < end_s)
        .group_by(phases, Sample.version)
        .order_by(Sample.version)
    )
    return [(int(p), int(v), int(n)) for p, v, n in session.execute(stmt).all()]


def window(
    session: Session, rail_id: str, *, start_s: float, end_s: float, limit: int
) -> SampleRows:
    """Samples with start_s <= t < end_s, oldest first, at most ``limit``."""
    cols = (
        Sample.seq, Sample.t_s, Sample.version, Sample.vin_v, Sample.vout_v, Sample.iout_a,
        Sample.ambient_c, Sample.current_a, Sample.temp_c, Sample.flags, Sample.iin_a,
    )  # fmt: skip
    stmt = (
        select(*cols)
        .where(Sample.rail_id == rail_id, Sample.t_s >= start_s, Sample.t_s < end_s)
        .order_by(Sample.t_s, Sample.seq)
        .limit(limit)
    )
    rows = session.execute(stmt).all()
    n = len(rows)

    def column(i: int) -> F64:
        return np.array([np.nan if r[i] is None else r[i] for r in rows], dtype=np.float64)

    # Phases per sample from the flags blob (one byte a phase): versions may differ.
    phases = np.array([len(r[9]) for r in rows], dtype=np.int64)
    widths = np.unique(phases)

    def blobs(i: int, dtype: str, missing: float) -> npt.NDArray[Any]:
        if widths.size <= 1:  # one phase count: one reshape
            joined = b"".join(cast(bytes, r[i]) for r in rows)
            return np.frombuffer(joined, dtype=dtype).reshape(n, -1) if n else np.empty((0, 0))
        out = np.full((n, int(widths[-1])), missing, dtype=dtype)
        for width in widths:  # one pass per phase count, not per sample
            picked = np.flatnonzero(phases == width)
            joined = b"".join(cast(bytes, rows[int(k)][i]) for k in picked)
            out[picked, : int(width)] = np.frombuffer(joined, dtype=dtype).reshape(-1, width)
        return out

    return SampleRows(
        seq=np.array([r[0] for r in rows], dtype=np.int64),
        t_s=column(1),
        version=np.array([r[2] for r in rows], dtype=np.int64),
        phase_count=phases,
        vin_v=column(3),
        vout_v=column(4),
        iout_a=column(5),
        ambient_c=column(6),
        current_a=blobs(7, "<f8", np.nan).astype(np.float64),
        temp_c=blobs(8, "<f8", np.nan).astype(np.float64),
        flags=blobs(9, "u1", 0).astype(np.uint8),
        iin_a=column(10),
    )
