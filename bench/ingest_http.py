"""Ingest over HTTP against its baselines (issue benchmarks 1, 2 and the memory of 7).

1. Single samples of a 12-phase rail, one per request, from many concurrent connections to a
   real ``phaseward serve`` (SQLite, synchronous=FULL: every answer follows a durable
   commit), against a bare FastAPI endpoint that parses the same bodies with the same schema
   and stores nothing. Throughput share, target >= 0.8. The server's CPU time per request is
   printed beside it: on these 2 cores it is what decides the share.
2. Batches of 100 samples per request: stored rows per second against raw ``sqlite3``
   ``executemany`` of the same rows into the same schema and pragmas, one transaction per
   100-row batch (the durability the service gives each request). Target >= 0.5. Once as
   sample objects, once as the columnar body the batching senders post; beside them, the
   schema's share: what parsing and checking a 100-sample body costs in this process, per
   form (objects, columns, CSV), against the server's CPU per request; and the floor: the
   same columnar bodies to a store-only endpoint (bench.store_only_app: HTTP, the schema, the
   same rows stored durably, no monitor), which no design with a monitor can exceed.
7. The server's peak resident memory after each, printed.

Run: ``python -m bench.ingest_http [seconds]``.
"""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys
import tempfile
import time
import timeit
from pathlib import Path
from typing import Any

import httpx
import numpy as np
from phaseward_client.columns import to_columns, to_csv
from tests.factories import rail_spec
from tests.servers import free_port, start_server, wait_until_healthy

from bench import loadgen
from bench.common import Row, peak_rss_bytes, print_rows
from bench.store_only_app import INSERT, open_store
from phaseward.api.schemas.columns import COLUMNS_JSON, parse_columns
from phaseward.api.schemas.columns_csv import parse_csv
from phaseward.api.schemas.samples import SAMPLES, to_incoming

SINGLE_CONNECTIONS = 64  # concurrent rigs, each posting its samples one by one
BATCH_CONNECTIONS = 8
BATCH = 100
RAIL = "ingest-12"
PATH = f"/v1/rails/{RAIL}/samples"


def cpu_seconds(pid: int) -> float:
    """User + system CPU time so far of a process and its live descendants (a server with
    worker processes, or with its judging helper, which a thread of the server starts), from
    /proc (Linux). A process that ended meanwhile counts nothing."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
        tasks = list(Path(f"/proc/{pid}/task").iterdir())
    except FileNotFoundError:
        return 0.0
    own = (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    return own + sum(cpu_seconds(child) for task in tasks for child in _children(task))


def _children(task: Path) -> list[int]:
    """The processes one thread started (a thread that ended meanwhile: none)."""
    try:
        return [int(child) for child in (task / "children").read_text().split()]
    except FileNotFoundError:
        return []


def as_columns(body: str) -> str:
    """A JSON array of samples as the columnar body the batching senders post."""
    return json.dumps(to_columns(json.loads(body)))


def _load(
    port: int, pid: int, connections: int, per_request: int, seconds: float, *,
    columns: bool = False, most_per_s: int = 8000,
) -> dict[str, Any]:  # fmt: skip
    """Closed-loop load; requests per second, statuses and server CPU per request. Bodies
    are built for ``most_per_s`` samples a second, more than the server can take."""
    t0 = time.time() - 3600
    count = int(most_per_s * seconds / connections / per_request) + 50
    streams = []
    for c in range(connections):
        bodies = loadgen.bodies(c, connections, count, per_request, t0)
        if columns:
            streams.append({
                "paths": [PATH], "bodies": [as_columns(b) for b in bodies],
                "content_type": COLUMNS_JSON,
            })  # fmt: skip
        else:
            streams.append({"paths": [PATH], "bodies": bodies})
    cpu = cpu_seconds(pid)
    found = loadgen.run({"port": port, "duration_s": seconds, "streams": streams})
    done = sum(len(x) for x in found["latencies_s"])
    return {
        "rate": done / found["elapsed_s"],
        "statuses": found["statuses"],
        "cpu_ms_per_request": 1e3 * (cpu_seconds(pid) - cpu) / max(done, 1),
    }


def _bare(seconds: float) -> dict[str, Any]:
    port = free_port()
    proc = subprocess.Popen([sys.executable, "-m", "bench.bare_app", str(port)])
    try:
        wait_until_healthy(proc, port)
        _load(port, proc.pid, SINGLE_CONNECTIONS, 1, 1.0)  # warm-up
        return _load(port, proc.pid, SINGLE_CONNECTIONS, 1, seconds)
    finally:
        proc.terminate()
        proc.wait(timeout=20)


def _phaseward(
    data_dir: Path, connections: int, per_request: int, seconds: float, *, columns: bool = False
) -> dict[str, Any]:
    port = free_port()
    proc = start_server(data_dir, port)
    try:
        spec = rail_spec(id=RAIL, phase_count=loadgen.PHASES, load_a=300.0)
        httpx.post(f"http://127.0.0.1:{port}/v1/rails", json=spec).raise_for_status()
        found = _load(port, proc.pid, connections, per_request, seconds, columns=columns)
        found["rss_mb"] = peak_rss_bytes(proc.pid) / 2**20
    finally:
        proc.terminate()
        proc.wait(timeout=20)
    with sqlite3.connect(data_dir / "phaseward.db") as db:  # what was stored, not what was sent
        found["rows"] = db.execute("SELECT count(*) FROM samples").fetchone()[0]
    return found


def _store_only(data_dir: Path, seconds: float) -> dict[str, Any]:
    """Columnar batches to the store-only endpoint: HTTP, the schema and a durable insert."""
    port = free_port()
    proc = subprocess.Popen(
        [sys.executable, "-m", "bench.store_only_app", str(port), str(data_dir)]
    )
    try:
        wait_until_healthy(proc, port)
        found = _load(
            port, proc.pid, BATCH_CONNECTIONS, BATCH, seconds, columns=True, most_per_s=60_000
        )
    finally:
        proc.terminate()
        proc.wait(timeout=20)
    with sqlite3.connect(data_dir / "phaseward.db") as db:
        stored = db.execute("SELECT count(*) FROM samples").fetchone()[0]
    assert stored == BATCH * found["statuses"].get("200", 0), "the floor stored less than it said"
    return found


def _raw_rows(batches: int) -> list[list[tuple[Any, ...]]]:
    """The rows the service stores for the benchmark's samples, as the service packs them."""
    t0 = time.time() - 3600
    out = []
    for b in range(batches):
        rows = []
        for item in json.loads(loadgen.bodies(b, batches, 1, BATCH, t0)[0]):
            current = np.array([p["current_a"] for p in item["phases"]], dtype="<f8")
            temp = np.array([p["temp_c"] for p in item["phases"]], dtype="<f8")
            rows.append((
                RAIL, item["seq"], item["time"], 1, item["vin_v"], item["vout_v"], None, None,
                current.tobytes(), temp.tobytes(), bytes(loadgen.PHASES),
            ))  # fmt: skip
        out.append(rows)
    return out


def _raw_sqlite(data_dir: Path, batches: list[list[tuple[Any, ...]]]) -> float:
    """Rows per second: executemany of each batch in its own transaction, into the service's
    schema with its pragmas (WAL, synchronous=FULL)."""
    db = open_store(data_dir)
    db.execute("INSERT INTO rails (id, version, created_s, updated_s) VALUES (?, 1, 0, 0)", (RAIL,))
    started = time.perf_counter()
    for rows in batches:
        db.execute("BEGIN IMMEDIATE")
        db.executemany(INSERT, rows)
        db.execute("COMMIT")
    elapsed = time.perf_counter() - started
    stored = db.execute("SELECT count(*) FROM samples").fetchone()[0]
    db.close()
    assert stored == sum(len(r) for r in batches)
    return stored / elapsed


def schema_ms() -> dict[str, float]:
    """Milliseconds of CPU to parse and check one 100-sample body into the monitor's arrays,
    per form (best of 5 runs of 20, in this process; CPU time, as the machine is shared)."""
    items = loadgen.bodies(0, 1, 1, BATCH, time.time() - 3600)[0]
    objects, columns = items.encode(), as_columns(items).encode()
    csv_body = to_csv(json.loads(columns)).encode()
    forms = {
        "objects": lambda: to_incoming(SAMPLES.validate_python(json.loads(objects))),
        "columns": lambda: parse_columns(columns, max_items=BATCH),
        "CSV": lambda: parse_csv(csv_body, max_items=BATCH),
    }
    return {
        name: 1e3 * min(timeit.repeat(parse, number=20, repeat=5, timer=time.process_time)) / 20
        for name, parse in forms.items()
    }


def rows(seconds: float = 10.0) -> list[Row]:
    with tempfile.TemporaryDirectory() as tmp:
        bare = _bare(seconds)
        single = _phaseward(Path(tmp, "single"), SINGLE_CONNECTIONS, 1, seconds)
        batched = _phaseward(Path(tmp, "batched"), BATCH_CONNECTIONS, BATCH, seconds)
        by_columns = _phaseward(
            Path(tmp, "columns"), BATCH_CONNECTIONS, BATCH, seconds, columns=True
        )
        store_only = _store_only(Path(tmp, "store-only"), seconds)
        raw_rate = _raw_sqlite(Path(tmp, "raw"), _raw_rows(2000))
    schema = schema_ms()
    stored_per_s = batched["rows"] / seconds
    columns_per_s = by_columns["rows"] / seconds
    floor_per_s = BATCH * store_only["rate"]
    floor = (
        f"; a store-only endpoint (HTTP, the columnar schema, the same rows stored durably, no "
        f"monitor) {floor_per_s:.0f} rows/s, {floor_per_s / raw_rate:.3f} of executemany, at "
        f"{store_only['cpu_ms_per_request']:.2f} ms per request"
    )
    return [
        Row(
            f"single-sample ingest over HTTP, 12 phases, {SINGLE_CONNECTIONS} connections, "
            "vs a bare parsing endpoint",
            f"{single['rate']:.0f} req/s", f"{bare['rate']:.0f} req/s",
            single["rate"] / bare["rate"], 0.8,
            note=(
                f"server CPU per request {single['cpu_ms_per_request']:.3f} ms vs bare "
                f"{bare['cpu_ms_per_request']:.3f} ms; statuses {single['statuses']} vs "
                f"{bare['statuses']}; {single['rows']} rows stored; "
                f"peak RSS {single['rss_mb']:.0f} MiB"
            ),
        ),
        Row(
            f"batched ingest, {BATCH} samples per request, {BATCH_CONNECTIONS} connections, "
            "vs sqlite3 executemany per batch",
            f"{stored_per_s:.0f} rows/s", f"{raw_rate:.0f} rows/s", stored_per_s / raw_rate, 0.5,
            note=(
                f"server CPU per 100-sample request {batched['cpu_ms_per_request']:.2f} ms, of "
                f"which the schema {schema['objects']:.2f} ms; "
                f"statuses {batched['statuses']}; peak RSS {batched['rss_mb']:.0f} MiB"
            ),
        ),
        Row(
            f"batched ingest as columns, {BATCH} samples per request, {BATCH_CONNECTIONS} "
            "connections, vs sqlite3 executemany per batch",
            f"{columns_per_s:.0f} rows/s", f"{raw_rate:.0f} rows/s", columns_per_s / raw_rate,
            0.5,
            note=(
                f"server CPU per 100-sample request {by_columns['cpu_ms_per_request']:.2f} ms, "
                f"of which the schema {schema['columns']:.2f} ms (CSV {schema['CSV']:.2f} ms); "
                f"statuses {by_columns['statuses']}; peak RSS {by_columns['rss_mb']:.0f} MiB"
                + floor
            ),
        ),
    ]  # fmt: skip


if __name__ == "__main__":
    print_rows(rows(float(sys.argv[1]) if len(sys.argv) > 1 else 10.0))
