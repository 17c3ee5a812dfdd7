"""Bounded load test on loopback: writers post samples (one per request) to a real server while
readers ask for status and events. Prints throughput, p50/p99 latencies and the error count.

Run: ``python -m bench.load_ingest [seconds]`` (``python -m bench`` runs every benchmark).
Traffic goes to 127.0.0.1 only; every loop is bounded by the duration; nothing is asserted
about speed.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import httpx
from tests.factories import rail_spec
from tests.servers import free_port, start_server

from bench.common import Row, print_rows

WRITERS, READERS, PHASES = 4, 2, 12


def twelve_phase_sample(seq: int, t0: float) -> dict[str, Any]:
    phases = [
        {"index": i, "current_a": 20.0 + 0.1 * (i % 3), "temp_c": 60.0} for i in range(PHASES)
    ]
    return {"time": t0 + seq * 0.01, "seq": seq, "vin_v": 12.0, "vout_v": 1.0, "phases": phases}


def percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))] if ordered else float("nan")


def rows(duration_s: float = 10.0) -> list[Row]:
    with tempfile.TemporaryDirectory() as tmp:
        port = free_port()
        proc = start_server(Path(tmp), port)
        base = f"http://127.0.0.1:{port}"
        try:
            for w in range(WRITERS):
                spec = rail_spec(id=f"load-{w}", phase_count=PHASES, load_a=300.0)
                httpx.post(f"{base}/v1/rails", json=spec).raise_for_status()
            stop = time.monotonic() + duration_s
            write_ms: list[float] = []
            read_ms: list[float] = []
            errors: list[str] = []
            lock = threading.Lock()
            t0 = time.time() - 3600

            def writer(w: int) -> None:
                seq = 0
                with httpx.Client(base_url=base, timeout=30) as c:
                    while time.monotonic() < stop:
                        started = time.perf_counter()
                        r = c.post(f"/v1/rails/load-{w}/samples", json=twelve_phase_sample(seq, t0))
                        with lock:
                            write_ms.append((time.perf_counter() - started) * 1e3)
                            if r.status_code != 200:
                                errors.append(f"POST {r.status_code}")
                        seq += 1

            def reader(n: int) -> None:
                with httpx.Client(base_url=base, timeout=30) as c:
                    k = 0
                    while time.monotonic() < stop:
                        path = (
                            f"/v1/rails/load-{k % WRITERS}/status"
                            if k % 2
                            else "/v1/events?limit=50"
                        )
                        started = time.perf_counter()
                        r = c.get(path)
                        with lock:
                            read_ms.append((time.perf_counter() - started) * 1e3)
                            if r.status_code != 200:
                                errors.append(f"GET {r.status_code}")
                        k += 1

            threads = [threading.Thread(target=writer, args=(w,)) for w in range(WRITERS)]
            threads += [threading.Thread(target=reader, args=(n,)) for n in range(READERS)]
            for t in threads:
                t.start()
            for t in threads:
                t.join()
        finally:
            proc.terminate()
            proc.wait(timeout=20)

    def summary(xs: list[float]) -> str:
        p50 = statistics.median(xs) if xs else float("nan")
        return (f"{len(xs) / duration_s:.1f}/s, p50 {p50:.1f} ms, "
                f"p99 {percentile(xs, 0.99):.1f} ms")  # fmt: skip

    return [
        Row(
            f"bounded load, {duration_s:.0f} s: {WRITERS} writers of single {PHASES}-phase "
            f"samples, {READERS} readers of status and events: errors",
            f"{len(errors)} errors", "-", float(len(errors)), 0.0, at_least=False,
            note=f"ingest {summary(write_ms)}; reads {summary(read_ms)}"
            + (f"; errors {sorted(set(errors))}" if errors else ""),
        )
    ]  # fmt: skip


if __name__ == "__main__":
    print_rows(rows(float(sys.argv[1]) if len(sys.argv) > 1 else 10.0))
