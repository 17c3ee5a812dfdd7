"""Status and events latency while ingest runs at 80 % of its measured maximum, against the
same queries on the idle service (issue benchmark 5). Target: p99 under load at most 3 times
the idle p99.

The maximum is measured first on the same server (closed loop: single samples of a 12-phase
rail from many connections); then the readers ask for status and an events page at a steady
pace, once alone and once beside ingest paced at 80 % of that maximum.

Run: ``python -m bench.status_under_load [seconds]``.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import threading
from pathlib import Path
from typing import Any

import httpx
from tests.factories import rail_spec
from tests.servers import free_port, start_server

from bench import loadgen
from bench.common import Row, print_rows
from bench.ingest_http import PATH, RAIL, SINGLE_CONNECTIONS

READ_RATE_PER_S = 40.0  # operator screens and scripts polling, 20 of each per second
STATUS, EVENTS = f"/v1/rails/{RAIL}/status", "/v1/events?limit=50"


def percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))]


def _ingest(port: int, seconds: float, first: int, rate: float | None) -> dict[str, Any]:
    count = int(8000 * seconds / SINGLE_CONNECTIONS) + 50
    streams = [
        {"paths": [PATH], "bodies": loadgen.bodies(c, SINGLE_CONNECTIONS, count, 1, 1.7e9, first)}
        for c in range(SINGLE_CONNECTIONS)
    ]
    config: dict[str, Any] = {"port": port, "duration_s": seconds, "streams": streams}
    if rate is not None:
        config["rate_per_s"] = rate
    return loadgen.run(config)


def _reads(port: int, seconds: float) -> dict[str, list[float]]:
    """Latencies (ms) of status and of the events page, one connection each."""
    found = loadgen.run({
        "port": port, "duration_s": seconds, "rate_per_s": READ_RATE_PER_S,
        "streams": [{"paths": [STATUS]}, {"paths": [EVENTS]}],
    })  # fmt: skip
    bad = {k: v for k, v in found["statuses"].items() if k != "200"}
    if bad:
        raise RuntimeError(f"reads failed: {bad}")
    status, events = found["latencies_s"]
    return {"status": [1e3 * x for x in status], "events": [1e3 * x for x in events]}


def rows(seconds: float = 10.0) -> list[Row]:
    with tempfile.TemporaryDirectory() as tmp:
        port = free_port()
        proc = start_server(Path(tmp), port)
        try:
            spec = rail_spec(id=RAIL, phase_count=loadgen.PHASES, load_a=300.0)
            httpx.post(f"http://127.0.0.1:{port}/v1/rails", json=spec).raise_for_status()
            peak = _ingest(port, seconds, 0, None)
            max_rate = sum(len(x) for x in peak["latencies_s"]) / peak["elapsed_s"]
            idle = _reads(port, seconds)
            loaded: dict[str, Any] = {}

            def background() -> None:
                loaded["ingest"] = _ingest(port, seconds + 2.0, 10**6, 0.8 * max_rate)

            writer = threading.Thread(target=background)
            writer.start()
            busy = _reads(port, seconds)
            writer.join()
        finally:
            proc.terminate()
            proc.wait(timeout=20)
    ingest = loaded["ingest"]
    if set(ingest["statuses"]) != {"200"}:
        raise RuntimeError(f"ingest under load failed: {ingest['statuses']}")
    achieved = sum(len(x) for x in ingest["latencies_s"]) / ingest["elapsed_s"]
    out = []
    for name in ("status", "events"):
        p99_idle, p99_busy = percentile(idle[name], 0.99), percentile(busy[name], 0.99)
        out.append(Row(
            f"{name} p99 under ingest at 80 % of its maximum vs idle",
            f"{p99_busy:.1f} ms", f"{p99_idle:.1f} ms", p99_busy / p99_idle, 3.0,
            at_least=False,
            note=(
                f"p50 {statistics.median(busy[name]):.1f} ms under load vs "
                f"{statistics.median(idle[name]):.1f} ms idle; ingest maximum "
                f"{max_rate:.0f} samples/s, paced at {achieved:.0f}/s "
                f"(statuses {ingest['statuses']}); {len(busy[name])} reads"
            ),
        ))  # fmt: skip
    return out


if __name__ == "__main__":
    print_rows(rows(float(sys.argv[1]) if len(sys.argv) > 1 else 10.0))
