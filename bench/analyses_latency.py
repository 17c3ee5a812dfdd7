"""Benchmark: screening (all singles and pairs) and a 24 h forecast of a 12-phase rail against
an empty endpoint, all over HTTP to a real server on loopback in the same run.

Run: ``python -m bench.analyses_latency`` (``python -m bench`` runs every benchmark).
Prints medians, the baseline, the ratio and the
target; asserts nothing about speed.
"""

from __future__ import annotations

import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import httpx
import uvicorn

from bench.common import Row, median_time, print_rows
from phaseward.api.app import create_app
from phaseward.demo import DEMO_RAIL, scenario_samples
from phaseward.settings import Settings

REPEATS = 15
# "A small multiple" of an empty endpoint, taken here as 50: an empty request costs under a
# millisecond on loopback, so 50x keeps both analyses interactive (tens of milliseconds).
TARGET = 50.0


def twelve_phase_rail() -> dict[str, Any]:
    rail = dict(DEMO_RAIL, id="bench-12", phase_count=12, load_a=400.0)
    return rail


def samples_for_twelve(n: int) -> list[dict[str, Any]]:
    """The demo's first samples, widened from six phases to twelve."""
    out = []
    for s in scenario_samples(start_s=time.time() - 3600)[:n]:
        phases = [dict(p, index=i) for i, p in enumerate(s["phases"] + s["phases"])]
        for p in phases:
            p["breaker_tripped"] = False
        out.append(dict(s, phases=phases))
    return out


def rows() -> list[Row]:
    with tempfile.TemporaryDirectory() as tmp:
        settings = Settings(data_dir=Path(tmp), port=8490, log_level="warning", auth_mode="open")
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
            empty = median_time(lambda: c.get("/healthz").raise_for_status(), REPEATS)
            timed = [
                ("screening of a 12-phase rail, singles and pairs, vs an empty endpoint",
                 median_time(lambda: c.get("/v1/rails/bench-12/screening",
                                           params={"depth": 2}).raise_for_status(), REPEATS)),
                ("forecast, 24 h, 500 points, vs an empty endpoint",
                 median_time(lambda: c.post("/v1/rails/bench-12/forecast",
                                            json={"horizon_s": 86400, "points": 500}
                                            ).raise_for_status(), REPEATS)),
            ]  # fmt: skip
        server.should_exit = True
        thread.join(timeout=10)
    return [
        Row(
            name,
            f"{seconds * 1e3:.1f} ms",
            f"{empty * 1e3:.2f} ms",
            seconds / empty,
            TARGET,
            at_least=False,
            note="over HTTP on loopback to a real server",
        )
        for name, seconds in timed
    ]


if __name__ == "__main__":
    print_rows(rows())
