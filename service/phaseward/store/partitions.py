"""PostgreSQL only: the samples table is partitioned by sample time (declarative RANGE
partitions on ``t_s``), so retention drops whole partitions and a history read scans only the
partitions its window touches. SQLite keeps one plain table and every function here is a
no-op there.

Partitions cover whole periods [k P, (k + 1) P) of epoch seconds, named after the UTC day they
start. A default partition takes samples dated where no partition exists yet (a clock far off,
a backfill); rolling creates the partitions of the current and upcoming periods ahead of time,
and one for every period the default partition holds rows of, moving those rows into it.

Uniqueness of (rail_id, seq) cannot be a constraint of a table partitioned by time (a unique
index there must include the partition key), so the primary key is (rail_id, seq, t_s) and
the per-rail row lock ingest holds while it looks a seq up and inserts it decides: one writer
per rail at a time, across processes."""

from __future__ import annotations

import re
import time
from dataclasses import dataclass

from sqlalchemy import Connection, Engine, text

DAY_S = 86400.0
DEFAULT = "samples_default"
ROLL_LOCK = int.from_bytes(b"pw-parts", "big")  # advisory lock key: one roll or drop at a time
_BOUND = re.compile(r"FROM \('?([-+0-9.eE]+)'?\) TO \('?([-+0-9.eE]+)'?\)")


@dataclass(frozen=True)
class Partition:
    name: str
    lo: float  # first second covered
    hi: float  # first second after


def is_partitioned(conn: Connection) -> bool:
    if conn.dialect.name != "postgresql":
        return False
    kind = conn.execute(text("SELECT relkind FROM pg_class WHERE oid = to_regclass('samples')"))
    return kind.scalar() == "p"


def listing(conn: Connection) -> list[Partition]:
    """The range partitions of samples (not the default one), oldest first."""
    rows = conn.execute(
        text(
            "SELECT c.relname, pg_get_expr(c.relpartbound, c.oid) FROM pg_inherits i "
            "JOIN pg_class c ON c.oid = i.inhrelid WHERE i.inhparent = 'samples'::regclass"
        )
    ).all()
    out = []
    for name, bound in rows:
        found = _BOUND.search(bound or "")
        if found:
            out.append(Partition(name, float(found.group(1)), float(found.group(2))))
    return sorted(out, key=lambda p: p.lo)


def name_for(lo: float) -> str:
    day = time.strftime("%Y%m%d", time.gmtime(lo)) if 0 <= lo < 253402300800 else f"{lo:.0f}"
    return f"samples_{day}".replace("-", "m")


def create_default(conn: Connection) -> None:
    conn.execute(text(f"CREATE TABLE IF NOT EXISTS {DEFAULT} PARTITION OF samples DEFAULT"))


def ensure(conn: Connection, lo: float, hi: float) -> bool:
    """Create the partition [lo, hi) unless one overlaps it; rows of that range held by the
    default partition move into it (attaching refuses while the default holds any). Returns
    whether a partition was made. Run inside a transaction holding ``ROLL_LOCK``."""
    if any(p.lo < hi and lo < p.hi for p in listing(conn)):
        return False
    name = name_for(lo)
    bounds = {"lo": lo, "hi": hi}
    # The default partition first, and exclusively: its rows in range must not grow while
    # they move (an insert routed there meanwhile waits for this commit).
    conn.execute(text(f"LOCK TABLE {DEFAULT} IN ACCESS EXCLUSIVE MODE"))
    conn.execute(text(f"CREATE TABLE {name} (LIKE samples INCLUDING DEFAULTS)"))
    conn.execute(
        text(
            f"WITH moved AS (DELETE FROM {DEFAULT} WHERE t_s >= :lo AND t_s < :hi RETURNING *) "
            f"INSERT INTO {name} SELECT * FROM moved"
        ),
        bounds,
    )
    conn.execute(
        text(f"ALTER TABLE samples ATTACH PARTITION {name} FOR VALUES FROM ({lo!r}) TO ({hi!r})")
    )
    return True


def roll(engine: Engine, *, period_s: float, ahead: int, now_s: float | None = None) -> int:
    """Partitions for the previous, current and ``ahead`` upcoming periods, and for every
    period the default partition holds rows of. Safe to run from several processes at once
    (an advisory lock serialises them). Returns how many were made."""
    made = 0
    with engine.connect() as conn:
        if not is_partitioned(conn):
            return 0
        conn.rollback()
        with conn.begin():
            conn.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": ROLL_LOCK})
            now_k = int((time.time() if now_s is None else now_s) // period_s)
            held = conn.execute(
                text(f"SELECT DISTINCT floor(t_s / :p) FROM {DEFAULT}"), {"p": period_s}
            ).scalars()
            periods = sorted({*range(now_k - 1, now_k + ahead + 1), *(int(k) for k in held)})
            for k in periods:
                made += ensure(conn, k * period_s, (k + 1) * period_s)
    return made


def drop(conn: Connection, part: Partition) -> None:
    conn.execute(text(f"DROP TABLE {part.name}"))
