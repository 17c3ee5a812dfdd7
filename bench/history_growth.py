"""Benchmark: reads that must not slow down as history piles up, and the server's peak memory.

One 12-phase rail with 10^4, 10^5, 10^6 and 10^7 stored samples (one a second, so an hour
is 3600 samples at every size) and one event per 50 samples. The same SQLite database grows
from size to size: the history is written straight into the file in the service's row layout
while no server runs, then the newest samples go through ``POST /samples`` so the live state
and its events are the service's own. At each size a real server is started and timed on
status, three event pages, and the newest hour (and two hours) of samples and of per-minute
history; its peak resident memory is read before it stops.

Run: ``python -m bench.history_growth [sizes ...]``, e.g. ``1e4 1e5`` for a quick run (the
default is 1e4 1e5 1e6 1e7; ``python -m bench`` runs every benchmark). The database lives
in a temporary directory under /tmp (about 3 GB at 10^7) and is removed at the end.
"""

from __future__ import annotations

import json
import sqlite3
import sys
import tempfile
import time
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any, NamedTuple

import httpx
import numpy as np
from tests.factories import rail_spec
from tests.servers import free_port, start_server

from bench.common import Row, mean_time, median_time, peak_rss_bytes, print_rows

SIZES = (10**4, 10**5, 10**6, 10**7)
RAIL, PHASES, VERSION = "history-12", 12, 1
PERIOD_S = 1.0  # one sample a second: an hour is 3600 samples whatever the total
EVENT_EVERY = 50  # samples per event: at 10^4 samples, two of the four kinds fill a page of 50
LIVE = 10  # newest samples of each size, posted over HTTP
CHUNK = 200_000  # rows per executemany call and per transaction
HOUR_S = 3600.0
# 3600 samples in one answer: more than the default page size of 1000.
SERVER_ENV = {"PHASEWARD_MAX_PAGE_SIZE": "10000"}
FLAT = 2.0  # "flat": at 1000 times the history, at most twice the time
# Twice the window reads twice the rows: up to 2.5 times the time leaves room for noise
# while a cost that grows faster than the window (a sort, a rescan) would pass it.
PROPORTIONAL = 2.5
# Nothing the server keeps grows with the samples stored: SQLite's page cache is bounded
# per connection (2 MB by default) and every answer is bounded by its window. A server that
# read the history whole would need gigabytes at 10^7, so 1.25 of the baseline (~50 MB on
# a server of ~200 MB) separates the two plainly.
MEMORY = 1.25

SAMPLE_SQL = (
    "INSERT INTO samples (rail_id, seq, t_s, version, vin_v, vout_v, iout_a, ambient_c, "
    "current_a, temp_c, flags) VALUES (?, ?, ?, ?, ?, ?, NULL, NULL, ?, ?, ?)"
)
EVENT_SQL = (
    "INSERT INTO events (rail_id, version, t_s, kind, severity, phase, message, details) "
    "VALUES (?, ?, ?, ?, ?, ?, ?, ?)"
)
EVENT_KINDS = ("sharing.imbalance", "thermal.warning", "phase.suspect", "telemetry.gap")


def sample_rows(
    first: int, end: int, t0: float, rng: np.random.Generator
) -> Iterator[tuple[Any, ...]]:
    """Samples with seq first..end-1 packed as the service stores them (float64 LE per phase)."""
    n = end - first
    current = np.ascontiguousarray(25.0 + rng.normal(0.0, 0.5, (n, PHASES)), "<f8").tobytes()
    temp = np.ascontiguousarray(60.0 + rng.normal(0.0, 1.0, (n, PHASES)), "<f8").tobytes()
    vin = 12.0 + rng.normal(0.0, 0.01, n)
    flags = bytes(PHASES)  # no flag set on any phase
    w = 8 * PHASES  # bytes per row of one per-phase column
    for k in range(n):
        seq = first + k
        yield (RAIL, seq, t0 + seq * PERIOD_S, VERSION, float(vin[k]), 1.0,
               current[k * w:(k + 1) * w], temp[k * w:(k + 1) * w], flags)  # fmt: skip


def event_rows(first: int, end: int, t0: float) -> Iterator[tuple[Any, ...]]:
    start = -(-first // EVENT_EVERY) * EVENT_EVERY  # the first multiple of EVENT_EVERY
    for seq in range(start, end, EVENT_EVERY):
        n = seq // EVENT_EVERY
        kind, phase = EVENT_KINDS[n % len(EVENT_KINDS)], n % PHASES
        details = json.dumps({"seq": seq, "value": 25.0})
        yield (RAIL, VERSION, t0 + seq * PERIOD_S, kind, "warning", phase,
               f"phase {phase}: {kind}", details)  # fmt: skip


def fill(db: Path, *, first: int, end: int, t0: float, rng: np.random.Generator) -> None:
    """Add samples first..end-1 and their events straight into the file (no server running).
    Durability is off for this connection only: a crash loses nothing but benchmark data.
    The live state is moved to the newest of them, as if the service had judged them: a
    server starting on samples newer than its live state judges them first, as left waiting
    by a stop, and a history of millions is not that."""
    conn = sqlite3.connect(db, isolation_level=None)
    try:
        conn.execute("PRAGMA synchronous=OFF")
        for lo in range(first, end, CHUNK):
            hi = min(end, lo + CHUNK)
            conn.execute("BEGIN")
            conn.executemany(SAMPLE_SQL, sample_rows(lo, hi, t0, rng))
            conn.executemany(EVENT_SQL, event_rows(lo, hi, t0))
            conn.execute("COMMIT")
        if end > first:
            conn.execute(
                "UPDATE rail_state SET last_seq = ?, last_t_s = ? WHERE rail_id = ?",
                (end - 1, t0 + (end - 1) * PERIOD_S, RAIL),
            )
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    finally:
        conn.close()


def stored(db: Path) -> int:
    conn = sqlite3.connect(db)
    try:
        count: int = conn.execute(
            "SELECT count(*) FROM samples WHERE rail_id = ?", (RAIL,)
        ).fetchone()[0]
        return count
    finally:
        conn.close()


def live_samples(first: int, t0: float) -> list[dict[str, Any]]:
    return [
        {"time": t0 + seq * PERIOD_S, "seq": seq, "vin_v": 12.0, "vout_v": 1.0,
         "phases": [{"index": i, "current_a": 25.0, "temp_c": 60.0} for i in range(PHASES)]}
        for seq in range(first, first + LIVE)
    ]  # fmt: skip


class Query(NamedTuple):
    path: str
    params: dict[str, Any]
    holds: int | None  # samples (windows) or events (pages) the answer must hold
    timer: Callable[[Callable[[], object], int], float]
    repeats: int


# A window allocates tens of thousands of lists, and every few windows that triggers a full
# garbage collection (~65 ms on this service's heap): the mean charges each window its share;
# a median would charge a 2 h window for one in every call and a 1 h window in none. The
# small reads keep the median, which a neighbour's burst of load on the machine moves less.
WINDOW = (mean_time, 15)
SMALL = (median_time, 21)


def queries(end_s: float) -> dict[str, Query]:
    """The timed reads; windows end at ``end_s``."""

    def window(hours: int) -> dict[str, Any]:
        return {"since": end_s - hours * HOUR_S, "until": end_s}

    hour = int(HOUR_S / PERIOD_S)
    rail = f"/v1/rails/{RAIL}"
    return {
        "status": Query(f"{rail}/status", {}, None, *SMALL),
        "events page": Query("/v1/events", {"limit": 50}, 50, *SMALL),
        "rail events page": Query(f"{rail}/events", {"limit": 50}, 50, *SMALL),
        "events of two kinds": Query(
            "/v1/events", {"limit": 50, "kind": EVENT_KINDS[:2]}, 50, *SMALL
        ),
        "samples 1 h": Query(f"{rail}/samples", window(1) | {"limit": 10_000}, hour, *WINDOW),
        "samples 2 h": Query(f"{rail}/samples", window(2) | {"limit": 10_000}, 2 * hour, *WINDOW),
        "history 1 h": Query(f"{rail}/history", window(1), hour, *WINDOW),
        "history 2 h": Query(f"{rail}/history", window(2), 2 * hour, *WINDOW),
    }


def held(answer: dict[str, Any]) -> int:
    """Events in a page, or samples in a window of samples or of per-minute history."""
    if "items" in answer:
        return len(answer["items"])
    if "rows" in answer:
        return sum(int(r["count"]) for r in answer["rows"])
    return int(answer["count"])


def measure(base: str, *, end_s: float) -> dict[str, float]:
    """Time of each query, s (see WINDOW and SMALL). Each answer is checked first to hold what
    it should, so the sizes are compared on equal work."""
    times = {}
    with httpx.Client(base_url=base, timeout=300) as c:
        for name, q in queries(end_s).items():
            answer = c.get(q.path, params=q.params).raise_for_status().json()
            if q.holds is not None and held(answer) != q.holds:
                raise RuntimeError(f"{name}: the answer holds {held(answer)}, not {q.holds}")
            times[name] = q.timer(
                lambda q=q: c.get(q.path, params=q.params).raise_for_status(), q.repeats
            )
    return times


def grow(
    sizes: Sequence[int], data_dir: Path
) -> tuple[dict[int, dict[str, float]], dict[int, int], dict[int, float]]:
    """Grow one database through ``sizes``; at each, a fresh server is timed and its peak RSS
    read. Returns times by size, peak RSS (bytes) by size and fill time (s) by size."""
    t0 = time.time() - sizes[-1] * PERIOD_S  # the newest sample of the largest size is now
    rng = np.random.default_rng(7)
    db = data_dir / "phaseward.db"
    port = free_port()
    proc = start_server(data_dir, port, SERVER_ENV)  # the schema and the rail, the service's way
    try:
        spec = rail_spec(id=RAIL, phase_count=PHASES, load_a=300.0)
        httpx.post(f"http://127.0.0.1:{port}/v1/rails", json=spec).raise_for_status()
    finally:
        proc.terminate()
        proc.wait(timeout=30)
    times, rss, filled = {}, {}, {}
    have = 0
    for size in sizes:
        live_from = size - LIVE
        started = time.perf_counter()
        fill(db, first=have, end=live_from, t0=t0, rng=rng)
        filled[size] = time.perf_counter() - started
        port = free_port()
        proc = start_server(data_dir, port, SERVER_ENV)
        try:
            base = f"http://127.0.0.1:{port}"
            httpx.post(
                f"{base}/v1/rails/{RAIL}/samples", json=live_samples(live_from, t0), timeout=60
            ).raise_for_status()
            times[size] = measure(base, end_s=t0 + live_from * PERIOD_S)
            rss[size] = peak_rss_bytes(proc.pid)
        finally:
            proc.terminate()
            proc.wait(timeout=30)
        have = size
        if stored(db) != size:
            raise RuntimeError(f"{stored(db)} samples stored, not {size}")
        print(f"history_growth: {size:.0e} samples, filled in {filled[size]:.1f} s, "
              f"server peak RSS {rss[size] / 2**20:.0f} MiB", file=sys.stderr)  # fmt: skip
    return times, rss, filled


def rows(sizes: Sequence[int] = SIZES) -> list[Row]:
    ordered = sorted(sizes)
    if ordered[0] < 10**4:
        raise ValueError("the smallest size must hold two hours and a page of events: >= 10^4")
    with tempfile.TemporaryDirectory(dir="/tmp", prefix="phaseward-history-") as tmp:
        times, rss, filled = grow(ordered, Path(tmp))
    small, large = ordered[0], ordered[-1]
    span = f"{large:.0e} vs {small:.0e} samples stored"

    def ms(name: str) -> str:
        return ", ".join(f"{times[s][name] * 1e3:.2f}" for s in ordered) + " ms"

    at = "at " + ", ".join(f"{s:.0e}" for s in ordered)
    out = [
        Row(f"{label}, {span}", f"{times[large][name] * 1e3:.2f} ms",
            f"{times[small][name] * 1e3:.2f} ms", times[large][name] / times[small][name], FLAT,
            at_least=False, note=f"{at}: {ms(name)}")
        for name, label in (
            ("status", "status"),
            ("events page", "events page of 50, all rails"),
            ("rail events page", "events page of 50, one rail"),
            ("events of two kinds", "events page of 50, two kinds"),
            ("samples 1 h", "samples, newest hour (3600)"),
            ("history 1 h", "per-minute history, newest hour"),
        )
    ]  # fmt: skip
    out += [
        Row(f"{label}, 2 h vs 1 h window at {large:.0e} samples",
            f"{times[large][two] * 1e3:.2f} ms", f"{times[large][one] * 1e3:.2f} ms",
            times[large][two] / times[large][one], PROPORTIONAL, at_least=False,
            note=f"2 h window {at}: {ms(two)}")
        for one, two, label in (("samples 1 h", "samples 2 h", "samples"),
                                ("history 1 h", "history 2 h", "per-minute history"))
    ]  # fmt: skip
    mib = ", ".join(f"{rss[s] / 2**20:.0f}" for s in ordered)
    fills = ", ".join(f"{filled[s]:.1f}" for s in ordered)
    out.append(
        Row(f"server peak RSS, {span}", f"{rss[large] / 2**20:.0f} MiB",
            f"{rss[small] / 2**20:.0f} MiB", rss[large] / rss[small], MEMORY, at_least=False,
            note=f"VmHWM {at}: {mib} MiB; database filled step by step in {fills} s")
    )  # fmt: skip
    return out


if __name__ == "__main__":
    print_rows(rows([int(float(a)) for a in sys.argv[1:]] or SIZES))
