"""Benchmark: the time-limited rating table of a 12-phase rail (the rail as it is and its 12
single losses, each for 1 min, 10 min, 1 h and indefinitely) against an empty endpoint, over
HTTP to a real server on loopback in the same run.

Run: ``python -m bench.ratings_latency`` (``python -m bench`` runs every benchmark).
Prints the median, the baseline, the ratio and the target; asserts nothing about speed.
"""

from __future__ import annotations

import tempfile
import threading
import time
from pathlib import Path

import httpx
import uvicorn

from bench.analyses_latency import samples_for_twelve, twelve_phase_rail
from bench.common import Row, median_time, print_rows
from phaseward.api.app import create_app
from phaseward.settings import Settings

REPEATS = 15
TARGET = 100.0  # issue 13: the full table at most 100x an empty endpoint


def rows() -> list[Row]:
    with tempfile.TemporaryDirectory() as tmp:
        settings = Settings(data_dir=Path(tmp), port=8491, log_level="warning", auth_mode="open")
        config = uvicorn.Config(
            create_app(settings), host="127.0.0.1", port=settings.port, log_level="warning"
        )
        server = uvicorn.Server(config)
        thread = threading.Thread(target=server.run, daemon=True)
        thread.start()
        while not server.started:
            time.sleep(0.05)
        with httpx.Client(base_url=f"http://127.0.0.1:{settings.port}", timeout=120) as c:
            c.post("/v1/rails", json=twelve_phase_rail()).raise_for_status()
            c.post("/v1/rails/bench-12/samples", json=samples_for_twelve(50)).raise_for_status()
            table = c.get("/v1/rails/bench-12/ratings").raise_for_status().json()
            assert (len(table["cases"]), len(table["durations_s"])) == (13, 4)
            empty = median_time(lambda: c.get("/healthz").raise_for_status(), REPEATS)
            seconds = median_time(
                lambda: c.get("/v1/rails/bench-12/ratings").raise_for_status(), REPEATS
            )
        server.should_exit = True
        thread.join(timeout=10)
    return [
        Row(
            "ratings of a 12-phase rail, 13 cases x 4 durations, vs an empty endpoint",
            f"{seconds * 1e3:.1f} ms",
            f"{empty * 1e3:.2f} ms",
            seconds / empty,
            TARGET,
            at_least=False,
            note="over HTTP on loopback to a real server",
        )
    ]


if __name__ == "__main__":
    print_rows(rows())
