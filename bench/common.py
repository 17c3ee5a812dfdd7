"""The one shape every benchmark reports in: a measured figure, the baseline measured in the
same run, their ratio, and the target the ratio is held to."""

from __future__ import annotations

import os
import platform
import re
import statistics
import tempfile
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from importlib.metadata import version
from pathlib import Path
from typing import Any

import httpx
import uvicorn

from phaseward.api.app import create_app
from phaseward.demo import DEMO_RAIL, scenario_samples
from phaseward.settings import Settings


@dataclass(frozen=True)
class Row:
    """``ratio`` compares measured against baseline so that higher is better when
    ``at_least`` (e.g. speed-up, throughput share) and lower is better otherwise."""

    name: str
    measured: str
    baseline: str
    ratio: float
    target: float
    at_least: bool = True
    note: str = ""

    @property
    def met(self) -> bool:
        return self.ratio >= self.target if self.at_least else self.ratio <= self.target

    @property
    def target_text(self) -> str:
        return f"{'>=' if self.at_least else '<='} {self.target:g}"


def median_time(func: Callable[[], object], repeats: int = 5) -> float:
    """Median wall time of ``repeats`` calls, s (after one untimed warm-up call)."""
    func()
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def mean_time(func: Callable[[], object], repeats: int = 5) -> float:
    """Mean wall time of ``repeats`` calls, s (after one untimed warm-up call). For work that
    pays part of its cost in lumps every few calls (a full garbage collection once enough
    objects have piled up), where a median would count the lump in every call or in none."""
    func()
    start = time.perf_counter()
    for _ in range(repeats):
        func()
    return (time.perf_counter() - start) / repeats


def twelve_phase_rail() -> dict[str, Any]:
    """The demo rail widened to twelve phases (id ``bench-12``)."""
    return dict(DEMO_RAIL, id="bench-12", phase_count=12, load_a=400.0)


def samples_for_twelve(n: int) -> list[dict[str, Any]]:
    """The demo's first samples, widened from six phases to twelve."""
    out = []
    for s in scenario_samples(start_s=time.time() - 3600)[:n]:
        phases = [dict(p, index=i) for i, p in enumerate(s["phases"] + s["phases"])]
        for p in phases:
            p["breaker_tripped"] = False
        out.append(dict(s, phases=phases))
    return out


@contextmanager
def twelve_phase_server(port: int) -> Iterator[httpx.Client]:
    """A real server on loopback (uvicorn in a thread, open access, a fresh data directory)
    holding :func:`twelve_phase_rail` with 50 samples, and a client to it."""
    with tempfile.TemporaryDirectory() as tmp:
        settings = Settings(data_dir=Path(tmp), port=port, log_level="warning", auth_mode="open")
        config = uvicorn.Config(
            create_app(settings), host="127.0.0.1", port=settings.port, log_level="warning"
        )
        server = uvicorn.Server(config)
        thread = threading.Thread(target=server.run, daemon=True)
        thread.start()
        while not server.started:
            time.sleep(0.05)
        try:
            with httpx.Client(base_url=f"http://127.0.0.1:{settings.port}", timeout=120) as c:
                c.post("/v1/rails", json=twelve_phase_rail()).raise_for_status()
                c.post("/v1/rails/bench-12/samples", json=samples_for_twelve(50)).raise_for_status()
                yield c
        finally:
            server.should_exit = True
            thread.join(timeout=10)


def empty_endpoint_s(client: httpx.Client, repeats: int) -> float:
    """Median time of the empty endpoint, the baseline of the latency rows, s."""
    return median_time(lambda: client.get("/healthz").raise_for_status(), repeats)


def latency_row(name: str, seconds: float, empty: float, target: float) -> Row:
    """A row for an endpoint timed against the empty endpoint (lower is better)."""
    return Row(
        name,
        f"{seconds * 1e3:.1f} ms",
        f"{empty * 1e3:.2f} ms",
        seconds / empty,
        target,
        at_least=False,
        note="over HTTP on loopback to a real server",
    )


def peak_rss_bytes(pid: int) -> int:
    """Peak resident memory of a running process so far, bytes (VmHWM in /proc/<pid>/status,
    Linux): read it before the process exits."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) * 1024  # the kernel reports kB
    raise RuntimeError(f"process {pid} reports no VmHWM")


def table(rows: Sequence[Row]) -> str:
    head = "| benchmark | measured | baseline | ratio | target | met |\n|---|---|---|---|---|---|"
    lines = [
        f"| {r.name} | {r.measured} | {r.baseline} | {r.ratio:.3g} | {r.target_text} | "
        f"{'yes' if r.met else 'NO'} |"
        for r in rows
    ]
    notes = [f"* {r.name}: {r.note}" for r in rows if r.note]
    return "\n".join([head, *lines, "", *notes])


def print_rows(rows: Sequence[Row]) -> None:
    print(table(rows))


def machine() -> str:
    libs = ", ".join(f"{m} {version(m)}" for m in ("numpy", "scipy", "fastapi", "sqlalchemy"))
    return (
        f"{platform.node()} ({platform.machine()}, {os.cpu_count()} cores, "
        f"load {os.getloadavg()[0]:.2f} at the start), Python {platform.python_version()}, {libs}"
    )


def write_results(
    rows: Sequence[Row], path: Path, *, started: str, host: str, appendix: str = ""
) -> None:
    path.write_text(
        "# Benchmark results\n\n"
        f"Run `python -m bench` to measure again. This run: {started} on {host}.\n"
        "Every ratio compares figures measured side by side in the same run.\n\n"
        + table(rows)
        + "\n"
        + (f"\n{appendix}" if appendix else "")
    )


def write_section(text: str, heading: str, path: Path) -> None:
    """Replace the section under ``heading`` in a results file (or put it before the unmet
    targets' notes): a benchmark measured alone keeps the rest of the file."""
    old = path.read_text()
    pattern = re.compile(rf"{re.escape(heading)}\n.*?(?=\n## (?!#)|\Z)", re.S)
    if pattern.search(old):
        new = pattern.sub(lambda _: text.rstrip("\n") + "\n", old)
    else:
        marker = "## Targets not met"
        cut = old.find(marker)
        new = old + "\n" + text if cut < 0 else old[:cut] + text + "\n" + old[cut:]
    path.write_text(new)


def now_text() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
