"""A fleet on one machine: N rails (default 1,000) each posting one 12-phase sample a second
to one ``phaseward serve`` process, on PostgreSQL and on SQLite (issue 16).

Per database: the fleet runs for ``seconds`` (default 120) with single-sample requests from
``CONNECTIONS`` keep-alive connections paced to N samples/s in total, each connection taking
its rails in turn (the connections' schedules spread evenly over one interval, as
independent racks post, not every connection at one instant), while a reader asks for the
status of a random rail ``STATUS_RATE`` times a second. Reported: the achieved rate, ingest
p50/p99, status p99 and every non-2xx answer.
Beside it, in the same run, raw inserts of the same rows as the service packs them (SQLite:
``executemany``; PostgreSQL: ``COPY``; 1,000 rows a transaction, the most a cross-rail commit
could merge) into a fresh database with the service's schema, and that table's size per
million samples (measured on the rows inserted and scaled, stated as such). Then a search
for the largest fleet one process sustains: the target's conditions (achieved >= 98 % of
offered, ingest p99 <= 250 ms, status p99 <= 50 ms, no errors) for ``search_seconds``.

The row's ratio is the worst of achieved / (98 % of offered) capped at 1, 250 ms / ingest p99
and 50 ms / status p99 (0 with any error), so it reaches 1 exactly when the fleet is sustained
as the search judges it. (Achieved counts the answers over the time until the last one, which
comes after the last interval: a fleet that keeps pace shows a little under its offer, 999.96
of 1,000 samples/s over 120 s, and the plain ratio could never reach 1.)

Run: ``python -m bench.fleet [--rails N] [--seconds S] [--db sqlite|postgres|both]``; with
``PHASEWARD_BENCH_QUICK=1`` the defaults shrink to 100 rails for 20 s (development only);
with ``PHASEWARD_BENCH_WORKERS=N`` the PostgreSQL server runs ``serve --workers N`` (the row
says so; the server CPU is summed over its processes). The server runs with the fleet's
settings (README, "Fleet"): routine samples judged within 5 s, and the monitor passes in its
judging helper process (its CPU is counted in the server's).
PostgreSQL from ``PHASEWARD_BENCH_DATABASE_URL`` (default the local test database), in a
schema of its own that is dropped afterwards.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import numpy as np
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url
from tests.factories import rail_spec
from tests.servers import free_port, wait_until_healthy

from bench import loadgen
from bench.common import Row, print_rows
from bench.ingest_http import cpu_seconds
from bench.status_under_load import percentile
from phaseward.settings import Settings
from phaseward.store.db import build_engine, migrate

QUICK = os.environ.get("PHASEWARD_BENCH_QUICK") == "1"
RAILS, SECONDS, SEARCH_SECONDS = (100, 20.0, 10.0) if QUICK else (1000, 120.0, 30.0)
CONNECTIONS = 50  # racks posting side by side, each for its share of the fleet
# The fleet's setting (README, "Fleet"): routine samples judged together within this, s;
# ``PHASEWARD_JUDGE_WITHIN_S`` in the environment overrides it (0: each sample on arrival).
JUDGE_WITHIN_S = os.environ.get("PHASEWARD_JUDGE_WITHIN_S", "5")
# The fleet's setting too: the monitor passes in the server's helper process (two cores, not
# one interpreter's turns); ``PHASEWARD_JUDGE_APART=0`` in the environment runs them inline.
JUDGE_APART = os.environ.get("PHASEWARD_JUDGE_APART", "1")
# ``serve --workers N`` on PostgreSQL (``PHASEWARD_BENCH_WORKERS``, default 1: the target is
# one process); SQLite always runs one.
WORKERS = int(os.environ.get("PHASEWARD_BENCH_WORKERS", "1"))
STATUS_RATE = 10.0  # status reads of a random rail per second (operator screens)
RAW_TX_ROWS = 1000
INGEST_P99_S, STATUS_P99_S, SUSTAINED = 0.25, 0.05, 0.98
PG_SERVER = os.environ.get(
    "PHASEWARD_BENCH_DATABASE_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)
COLUMNS = (
    "rail_id", "seq", "t_s", "version", "vin_v", "vout_v", "iout_a", "ambient_c", "current_a",
    "temp_c", "flags",
)  # fmt: skip


def rail_id(k: int) -> str:
    return f"fleet-{k:05d}"


def body(seq: int, t0: float) -> dict[str, Any]:
    """A 12-phase sample a second: the load generator's sample, dated t0 + seq."""
    return loadgen.sample(seq, 0.0) | {"time": t0 + seq}


@dataclass(frozen=True)
class Fleet:
    rails: int
    offered: float
    achieved: float
    ingest_p50_s: float
    ingest_p99_s: float
    status_p99_s: float
    errors: dict[str, int]
    cpu_ms: float  # server CPU per stored sample, status reads included (robust when shared)

    @property
    def sustained(self) -> bool:
        return (
            self.achieved >= SUSTAINED * self.offered and self.ingest_p99_s <= INGEST_P99_S
            and self.status_p99_s <= STATUS_P99_S and not self.errors
        )  # fmt: skip

    @property
    def score(self) -> float:
        return 0.0 if self.errors else min(
            1.0, self.achieved / (SUSTAINED * self.offered), INGEST_P99_S / self.ingest_p99_s,
            STATUS_P99_S / self.status_p99_s,
        )  # fmt: skip

    def text(self) -> str:
        return (
            f"{self.achieved:.1f} samples/s of {self.offered:.0f} offered, ingest p50 "
            f"{1e3 * self.ingest_p50_s:.0f} ms p99 {1e3 * self.ingest_p99_s:.0f} ms, status p99 "
            f"{1e3 * self.status_p99_s:.0f} ms, errors {sum(self.errors.values())}, server CPU "
            f"{self.cpu_ms:.1f} ms per sample (its status reads included)"
        )


@contextmanager
def database(kind: str, data_dir: Path) -> Iterator[str]:
    """A fresh database URL: a SQLite file in ``data_dir``, or a PostgreSQL schema."""
    if kind == "sqlite":
        yield f"sqlite:///{(data_dir / 'phaseward.db').as_posix()}"
        return
    admin = create_engine(PG_SERVER, isolation_level="AUTOCOMMIT")
    schema = f"bench_{uuid.uuid4().hex[:12]}"
    with admin.connect() as conn:
        conn.execute(text(f"CREATE SCHEMA {schema}"))
    try:
        url = make_url(PG_SERVER).update_query_dict({"options": f"-csearch_path={schema}"})
        yield url.render_as_string(hide_password=False)
    finally:
        with admin.connect() as conn:
            conn.execute(text(f"DROP SCHEMA {schema} CASCADE"))
        admin.dispose()


@contextmanager
def server(data_dir: Path, url: str) -> Iterator[tuple[int, int]]:
    """A ``phaseward serve`` on ``url``: its port and process id."""
    port = free_port()
    env = os.environ | {
        "PHASEWARD_DATA_DIR": str(data_dir), "PHASEWARD_DATABASE_URL": url,
        "PHASEWARD_PORT": str(port), "PHASEWARD_LOG_LEVEL": "warning",
        "PHASEWARD_AUTH_MODE": "open", "PHASEWARD_RATE_PER_S": "1e6",
        "PHASEWARD_RATE_BURST": "1000000", "PHASEWARD_JUDGE_WITHIN_S": JUDGE_WITHIN_S,
        "PHASEWARD_JUDGE_APART": JUDGE_APART,
    }  # fmt: skip
    workers = str(WORKERS if "postgresql" in url else 1)
    proc = subprocess.Popen(
        [sys.executable, "-m", "phaseward.cli", "serve", "--workers", workers], env=env
    )
    try:
        wait_until_healthy(proc, port)
        yield port, proc.pid
    finally:
        proc.terminate()
        proc.wait(timeout=30)


def make_rails(port: int, n: int) -> None:
    def make(k: int) -> None:
        spec = rail_spec(id=rail_id(k), phase_count=loadgen.PHASES, load_a=300.0)
        httpx.post(f"http://127.0.0.1:{port}/v1/rails", json=spec, timeout=60).raise_for_status()

    with ThreadPoolExecutor(4) as pool:
        list(pool.map(make, range(n)))


def run_fleet(
    server: tuple[int, int], rails: int, seconds: float, first_seq: int, t0: float
) -> Fleet:
    """``rails`` rails at one sample a second each for ``seconds``, and the status reader."""
    port, pid = server
    connections = min(CONNECTIONS, rails)
    per_connection = int(np.ceil(seconds * rails / connections)) + 2
    streams = []
    for c in range(connections):
        mine = list(range(c, rails, connections))
        turns = range(per_connection)
        streams.append({
            "paths": [f"/v1/rails/{rail_id(k)}/samples" for k in mine],
            "bodies": [json.dumps(body(first_seq + i // len(mine), t0)) for i in turns],
        })  # fmt: skip
    # Stream c cycles its paths with its bodies: request i goes to rail mine[i % m] with
    # seq first_seq + i // m, so every rail gets one sample per turn, in time order.
    pick = random.Random(first_seq)
    reads = [f"/v1/rails/{rail_id(pick.randrange(rails))}/status" for _ in range(1000)]
    status: dict[str, Any] = {}

    def reader() -> None:
        config = {"port": port, "duration_s": seconds, "rate_per_s": STATUS_RATE,
                  "streams": [{"paths": reads}]}  # fmt: skip
        status.update(loadgen.run(config))

    side = threading.Thread(target=reader)
    cpu = cpu_seconds(pid)
    side.start()
    found = loadgen.run(
        {"port": port, "duration_s": seconds, "rate_per_s": float(rails), "streams": streams}
    )
    side.join()
    cpu = cpu_seconds(pid) - cpu
    ingest = [x for lat in found["latencies_s"] for x in lat]
    errors = {
        f"{what} {code}": n
        for what, result in (("ingest", found), ("status", status))
        for code, n in result["statuses"].items()
        if not code.startswith("2")
    }
    ok = sum(n for code, n in found["statuses"].items() if code.startswith("2"))
    return Fleet(
        rails=rails, offered=float(rails), achieved=ok / found["elapsed_s"],
        ingest_p50_s=percentile(ingest, 0.5), ingest_p99_s=percentile(ingest, 0.99),
        status_p99_s=percentile(status["latencies_s"][0], 0.99), errors=errors,
        cpu_ms=1e3 * cpu / max(ok, 1),
    )  # fmt: skip


def quiet(pid: int, busy: float = 0.05, longest_s: float = 120.0) -> None:
    """Wait until the server uses less than ``busy`` of a core over a second (at most
    ``longest_s``): the samples a finished load left waiting are judged by then, and their
    passes do not run into the next probe (a thousand rails going quiet at once is another
    benchmark)."""
    deadline = time.monotonic() + longest_s
    while time.monotonic() < deadline:
        before = cpu_seconds(pid)
        time.sleep(1.0)
        if cpu_seconds(pid) - before < busy:
            return


def search(
    server: tuple[int, int], rails: int, first: Fleet, seconds: float, t0: float, seq: int
) -> tuple[int, str]:
    """Largest sustained fleet by bisection between 0 and ``rails`` (at most 4 probes, the
    first near what the full fleet achieved, each once the server is quiet), seqs from
    ``seq``. Returns it and the probes as text."""
    lo, hi = 0, rails
    if first.sustained:
        return rails, "the full fleet is sustained"
    probe = max(1, min(rails - 1, int(first.achieved * 0.8)))
    notes = []
    for _ in range(4):
        quiet(server[1])
        got = run_fleet(server, probe, seconds, seq, t0)
        seq += 2 * int(seconds) + 10  # past every seq a rail of the probe was sent
        notes.append(f"{probe} rails: {got.text()}")
        if got.sustained:
            lo = probe
        else:
            hi = probe
        if hi - lo <= max(1, lo // 10):
            break
        probe = (lo + hi) // 2 if lo else max(1, hi // 3)
    return lo, "; ".join(notes)


def raw_rows(rails: int, per_rail: int, t0: float) -> list[tuple[Any, ...]]:
    """The rows the service stores for the fleet's samples, packed as the service packs them."""
    item = body(0, t0)
    current = np.array([p["current_a"] for p in item["phases"]], dtype="<f8").tobytes()
    temp = np.array([p["temp_c"] for p in item["phases"]], dtype="<f8").tobytes()
    flags = bytes(loadgen.PHASES)
    return [
        (rail_id(k), s, t0 + s, 1, 12.0, 1.0, None, None, current, temp, flags)
        for s in range(per_rail) for k in range(rails)
    ]  # fmt: skip


def raw_insert(kind: str, url: str, rows: list[tuple[Any, ...]], rails: int) -> tuple[float, int]:
    """Rows per second of raw inserts into the service's schema (fresh), and the size of the
    samples afterwards, bytes (PostgreSQL: every partition with its indexes; SQLite: the
    database file)."""
    engine = build_engine(Settings(database_url=url))
    migrate(engine)
    with engine.begin() as conn:
        for k in range(rails):
            conn.execute(text("INSERT INTO rails VALUES (:r, 1, 0, 0)"), {"r": rail_id(k)})
            conn.execute(
                text("INSERT INTO rail_versions VALUES (:r, 1, '{}', 0)"), {"r": rail_id(k)}
            )
    chunks = [rows[i : i + RAW_TX_ROWS] for i in range(0, len(rows), RAW_TX_ROWS)]
    if kind == "sqlite":
        engine.dispose()
        path = make_url(url).database or ""
        db = sqlite3.connect(path, isolation_level=None)
        db.execute("PRAGMA journal_mode=WAL")
        db.execute(f"PRAGMA synchronous={Settings().sqlite_synchronous}")
        sql = f"INSERT INTO samples ({', '.join(COLUMNS)}) VALUES ({', '.join('?' * 11)})"
        started = time.perf_counter()
        for chunk in chunks:
            db.execute("BEGIN IMMEDIATE")
            db.executemany(sql, chunk)
            db.execute("COMMIT")
        elapsed = time.perf_counter() - started
        db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        db.close()
        return len(rows) / elapsed, Path(path).stat().st_size  # the whole file: samples, a
        # thousand rails and empty tables
    raw = engine.raw_connection()
    try:
        cur = raw.cursor()
        started = time.perf_counter()
        for chunk in chunks:
            with cur.copy(f"COPY samples ({', '.join(COLUMNS)}) FROM STDIN") as copy:  # type: ignore[attr-defined]
                for row in chunk:
                    copy.write_row(row)
            raw.commit()
        elapsed = time.perf_counter() - started
        cur.execute("SELECT sum(pg_total_relation_size(relid)) FROM pg_partition_tree('samples')")
        size = int(cur.fetchone()[0])
    finally:
        raw.close()
        engine.dispose()
    return len(rows) / elapsed, size


def measure(kind: str, rails: int, seconds: float, search_seconds: float) -> dict[str, Any]:
    t0 = time.time() - 86400  # a day back: the clock policy refuses samples from the future
    with tempfile.TemporaryDirectory() as tmp:
        with database(kind, Path(tmp)) as url, server(Path(tmp), url) as running:
            make_rails(running[0], rails)
            fleet = run_fleet(running, rails, seconds, 0, t0)
            largest, probes = search(
                running, rails, fleet, search_seconds, t0, 2 * int(seconds) + 10
            )
        raw_dir = Path(tmp, "raw")
        raw_dir.mkdir()
        per_rail = max(1, int(seconds))
        rows = raw_rows(rails, per_rail, t0)
        with database(kind, raw_dir) as url:
            rate, size = raw_insert(kind, url, rows, rails)
    return {"fleet": fleet, "largest": largest, "probes": probes, "raw_rate": rate,
            "bytes_per_million": size / len(rows) * 1e6, "raw_rows": len(rows)}  # fmt: skip


def rows(
    rails: int = RAILS, seconds: float = SECONDS, search_seconds: float = SEARCH_SECONDS,
    kinds: tuple[str, ...] = ("postgres", "sqlite"),
) -> list[Row]:  # fmt: skip
    out = []
    for kind in kinds:
        m = measure(kind, rails, seconds, search_seconds)
        fleet: Fleet = m["fleet"]
        raw = "COPY" if kind == "postgres" else "executemany"
        processes = "one process" if kind == "sqlite" or WORKERS == 1 else f"{WORKERS} workers"
        if JUDGE_APART in ("1", "true", "True"):
            processes += " and its judging helper"
        out.append(Row(
            f"fleet on {kind}: {rails} rails x 1 sample/s, 12 phases, {seconds:.0f} s, "
            f"{processes}, routine samples judged within {JUDGE_WITHIN_S} s (worst of rate, ingest "
            "p99 <= 250 ms, status p99 <= 50 ms)",
            fleet.text(), f"raw {raw} {m['raw_rate']:.0f} rows/s", fleet.score, 1.0,
            note=(
                f"largest fleet sustained: {m['largest']} rails ({m['probes']}); errors "
                f"{fleet.errors or 'none'}; samples table {m['bytes_per_million'] / 2**20:.0f} "
                f"MiB per million samples (measured on {m['raw_rows']} raw rows, scaled)"
            ),
        ))  # fmt: skip
    return out


if __name__ == "__main__":
    parser = argparse.ArgumentParser(prog="python -m bench.fleet")
    parser.add_argument("--rails", type=int, default=RAILS)
    parser.add_argument("--seconds", type=float, default=SECONDS)
    parser.add_argument("--search-seconds", type=float, default=SEARCH_SECONDS)
    parser.add_argument("--db", choices=("sqlite", "postgres", "both"), default="both")
    args = parser.parse_args()
    chosen = ("postgres", "sqlite") if args.db == "both" else (args.db,)
    print_rows(rows(args.rails, args.seconds, args.search_seconds, chosen))
