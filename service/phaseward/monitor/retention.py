"""Retention: raw samples older than the configured age are reduced to per-interval minimum,
maximum and mean, then deleted (on PostgreSQL, whole time partitions dropped); events are
kept. The same reduction answers history queries over raw samples, so reduced and raw history
read alike."""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from sqlalchemy import text
from sqlalchemy.orm import Session, sessionmaker

from phaseward.monitor import rails as rail_service
from phaseward.store import partitions, rails, samples, summaries
from phaseward.store.db import transaction
from phaseward.store.models import SampleSummary
from phaseward.store.samples import SampleRows

F64 = npt.NDArray[np.float64]
CHUNK_INTERVALS = 1440  # intervals reduced per transaction (a day at one-minute intervals)
MAX_HISTORY_ROWS = 1_000_000


@dataclass(frozen=True)
class Stats:
    """Per interval (m,): start, count; min/max/mean of vin, vout (m,) and of current and
    temperature (m, n_phases). NaN where an interval had no finite reading."""

    t_start_s: F64
    count: npt.NDArray[np.int64]
    stats: dict[str, tuple[F64, F64, F64]]


def reduce_rows(rows: SampleRows, interval_s: float) -> Stats:
    """Group samples by interval (floor(t / interval)) and reduce each group, vectorised."""
    group = np.floor(rows.t_s / interval_s)
    starts = np.flatnonzero(np.r_[True, np.diff(group) != 0])
    counts = np.diff(np.r_[starts, rows.t_s.size]).astype(np.int64)
    out: dict[str, tuple[F64, F64, F64]] = {}
    for name, values in (("vin_v", rows.vin_v), ("vout_v", rows.vout_v),
                         ("current_a", rows.current_a), ("temp_c", rows.temp_c)):  # fmt: skip
        finite = np.isfinite(values)
        n = np.add.reduceat(finite, starts, axis=0)
        low = np.minimum.reduceat(np.where(finite, values, np.inf), starts, axis=0)
        high = np.maximum.reduceat(np.where(finite, values, -np.inf), starts, axis=0)
        total = np.add.reduceat(np.where(finite, values, 0.0), starts, axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(n > 0, total / n, np.nan)
        out[name] = (np.where(n > 0, low, np.nan), np.where(n > 0, high, np.nan), mean)
    return Stats(t_start_s=group[starts] * interval_s, count=counts, stats=out)


def _pack(triple: tuple[F64, F64, F64], k: int) -> bytes:
    return np.ascontiguousarray(np.stack([a[k] for a in triple]), "<f8").tobytes()


def _unpack(blob: bytes, n_phases: int | None) -> F64:
    arr = np.frombuffer(blob, "<f8").astype(np.float64)
    return arr if n_phases is None else arr.reshape(3, n_phases)


def run(
    sessions: sessionmaker[Session], *, older_than_s: float, interval_s: float
) -> dict[str, int]:
    """Reduce every rail's samples older than ``older_than_s`` and remove them. On PostgreSQL
    a partition wholly older than that is reduced and dropped whole; rows elsewhere (the
    default partition, SQLite's plain table) are reduced and deleted up to a whole interval
    (every stored summary then covers a complete interval) and, on PostgreSQL, not into the
    partition that holds the cut (it goes whole, later). Returns counts."""
    now = time.time()
    cutoff = np.floor((now - older_than_s) / interval_s) * interval_s
    with sessions() as session:
        rail_ids = [r.id for r in rails.list_page(session, after=None, limit=1_000_000)]
        parted = partitions.is_partitioned(session.connection())
    reduced = deleted = dropped = 0
    if parted:
        with sessions() as session:
            parts = partitions.listing(session.connection())
        for part in parts:
            if part.hi <= now - older_than_s:
                n_intervals, n_rows = _drop_partition(sessions, part, rail_ids, interval_s)
                reduced, deleted, dropped = reduced + n_intervals, deleted + n_rows, dropped + 1
            elif part.lo < cutoff:
                cutoff = part.lo
    for rail_id in rail_ids:
        while True:
            with transaction(sessions) as session:
                if rails.get(session, rail_id, for_update=True) is None:
                    break  # deleted meanwhile
                oldest = summaries.oldest_sample_s(session, rail_id)
                if oldest is None or oldest >= cutoff:
                    break
                start = np.floor(oldest / interval_s) * interval_s
                end = min(cutoff, start + CHUNK_INTERVALS * interval_s)
                rows = samples.window(session, rail_id, start_s=start, end_s=end, limit=10_000_000)
                reduced += _store(session, rail_id, rows, interval_s)
                deleted += summaries.delete_samples_before(session, rail_id, end_s=end)
    return {"intervals": reduced, "samples_deleted": deleted, "partitions_dropped": dropped}


def _store(session: Session, rail_id: str, rows: SampleRows, interval_s: float) -> int:
    """Summaries of ``rows`` merged into those stored; returns how many intervals."""
    if not rows.t_s.size:
        return 0
    stats = reduce_rows(rows, interval_s)
    for k, t0 in enumerate(stats.t_start_s):
        summaries.put(session, _merged(session, rail_id, stats, k, float(t0), interval_s))
    return int(stats.count.size)


def _drop_partition(
    sessions: sessionmaker[Session], part: partitions.Partition, rail_ids: list[str],
    interval_s: float,
) -> tuple[int, int]:  # fmt: skip
    """Reduce one partition for every rail and drop it, in one transaction: a crash leaves
    it whole and unreduced, never reduced twice. Its lock makes a late sample for it wait,
    so none is dropped unreduced. An interval cut by the partition's edge is merged with
    its other part like a late sample."""
    reduced = rows_seen = 0
    with transaction(sessions) as session:
        conn = session.connection()
        conn.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": partitions.ROLL_LOCK})
        if part not in partitions.listing(conn):
            return 0, 0  # another process dropped it meanwhile
        conn.execute(text(f"LOCK TABLE {part.name} IN SHARE MODE"))
        for rail_id in rail_ids:
            rows = samples.window(
                session, rail_id, start_s=part.lo, end_s=part.hi, limit=10_000_000
            )
            reduced += _store(session, rail_id, rows, interval_s)
            rows_seen += int(rows.t_s.size)
        session.flush()
        partitions.drop(conn, part)
    return reduced, rows_seen


def _merged(
    session: Session, rail_id: str, stats: Stats, k: int, t0: float, interval_s: float
) -> dict[str, Any]:
    """The summary row of interval k, merged with one already stored for it (late samples):
    min of minima, max of maxima, means weighted by sample counts."""
    row: dict[str, Any] = {
        "rail_id": rail_id, "t_start_s": t0, "t_end_s": t0 + interval_s,
        "count": int(stats.count[k]),
        **{name: _pack(triple, k) for name, triple in stats.stats.items()},
    }  # fmt: skip
    old = session.get(SampleSummary, (rail_id, t0))
    if old is None:
        return row
    n_old, n_new = old.count, int(row["count"])
    for name in stats.stats:
        a = _unpack(getattr(old, name), None).reshape(3, -1)
        b = _unpack(row[name], None).reshape(3, -1)
        weighted = (np.nan_to_num(a[2]) * n_old + np.nan_to_num(b[2]) * n_new) / (n_old + n_new)
        mean = np.where(np.isnan(a[2]), b[2], np.where(np.isnan(b[2]), a[2], weighted))
        merged = np.stack([np.fmin(a[0], b[0]), np.fmax(a[1], b[1]), mean])
        row[name] = np.ascontiguousarray(merged, "<f8").tobytes()
    row["count"] = n_old + n_new
    return row


def history(
    session: Session, rail_id: str, *, start_s: float, end_s: float, interval_s: float
) -> dict[str, Any]:
    """Per-interval min/max/mean over [start, end): stored summaries where samples were
    reduced, the same reduction of raw samples elsewhere."""
    rail_service.get(session, rail_id)
    rows = samples.window(
        session, rail_id, start_s=start_s, end_s=end_s, limit=MAX_HISTORY_ROWS + 1
    )
    truncated = rows.t_s.size > MAX_HISTORY_ROWS
    out: dict[float, dict[str, Any]] = {}
    for s in summaries.in_range(session, rail_id, start_s=start_s, end_s=end_s):
        out[s.t_start_s] = {
            "t_start_s": s.t_start_s, "t_end_s": s.t_end_s, "count": s.count, "reduced": True,
            **{name: _triple(_unpack(getattr(s, name), None), name) for name in
               ("vin_v", "vout_v", "current_a", "temp_c")},
        }  # fmt: skip
    if rows.t_s.size:
        stats = reduce_rows(rows, interval_s)
        for k, t0 in enumerate(stats.t_start_s):
            raw = {
                "t_start_s": float(t0), "t_end_s": float(t0) + interval_s,
                "count": int(stats.count[k]), "reduced": False,
                **{name: _triple(np.stack([a[k] for a in triple]).ravel(), name)
                   for name, triple in stats.stats.items()},
            }  # fmt: skip
            out.setdefault(float(t0), raw)
    return {
        "rail_id": rail_id,
        "interval_s": interval_s,
        "truncated": truncated,
        "rows": [out[t] for t in sorted(out)],
    }


def _triple(flat: F64, name: str) -> dict[str, Any]:
    def clean(x: F64) -> Any:
        return [None if not np.isfinite(v) else float(v) for v in np.atleast_1d(x)]

    parts = flat.reshape(3, -1)
    values = [clean(p) for p in parts]
    if name in ("vin_v", "vout_v"):
        return {"min": values[0][0], "max": values[1][0], "mean": values[2][0]}
    return {"min": values[0], "max": values[1], "mean": values[2]}
