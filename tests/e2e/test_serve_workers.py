"""``phaseward serve --workers 2``: on PostgreSQL two processes share the port and the rails
(several rails fed concurrently, every sample read back, a clean stop that leaves no process);
on SQLite the command refuses, naming why."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx
import pytest
from tests.e2e.test_postgres_replicas import new_schema, wait_up  # noqa: F401 (a fixture)
from tests.factories import rail_spec, sample
from tests.servers import free_port

pytestmark = pytest.mark.e2e
RAILS = [f"fleet-{k}" for k in range(6)]
STEPS = 40


def _workers(pid: int) -> list[int]:
    """The worker processes uvicorn spawned under ``pid`` (not its resource tracker)."""
    children = Path(f"/proc/{pid}/task/{pid}/children").read_text().split()
    return [int(c) for c in children if b"spawn_main" in Path(f"/proc/{c}/cmdline").read_bytes()]


def _serve(tmp_path: Path, database_url: str, port: int) -> subprocess.Popen[bytes]:
    env = os.environ | {
        "PHASEWARD_DATA_DIR": str(tmp_path),
        "PHASEWARD_DATABASE_URL": database_url,
        "PHASEWARD_AUTH_MODE": "open",
        "PHASEWARD_LOG_LEVEL": "warning",
        "PHASEWARD_FUTURE_SKEW_S": "1e8",  # invented test data is dated 2027
    }
    cmd = [sys.executable, "-m", "phaseward.cli", "serve", "--workers", "2", "--port", str(port)]
    return subprocess.Popen(cmd, env=env, start_new_session=True)


def test_two_workers_on_postgres(tmp_path: Path, new_schema: Callable[[], str]) -> None:  # noqa: F811
    port = free_port()
    proc = _serve(tmp_path, new_schema(), port)
    try:
        wait_up(proc, f"http://127.0.0.1:{port}")
        workers = _workers(proc.pid)
        assert len(workers) == 2
        base = f"http://127.0.0.1:{port}/v1/rails"

        def feed(rail: str) -> list[int]:
            with httpx.Client(timeout=30) as client:
                made = client.post(base, json=rail_spec(id=rail))
                assert made.status_code == 201, made.text
                for step in range(0, STEPS, 4):  # four samples a request, new connection each
                    body = [sample(k, [20.0] * 4) for k in range(step, step + 4)]
                    answer = httpx.post(f"{base}/{rail}/samples", json=body, timeout=30)
                    assert answer.status_code == 200, answer.text
                    assert answer.json()["stored"] == 4
                window = {"since": 0, "until": 2e9}
                seqs: list[int] = client.get(f"{base}/{rail}/samples", params=window).json()["seq"]
                return seqs

        with ThreadPoolExecutor(len(RAILS)) as pool:
            for seqs in pool.map(feed, RAILS):
                assert seqs == list(range(STEPS))
        listed = httpx.get(base, params={"limit": 100}).json()
        assert sorted(r["id"] for r in listed) == sorted(RAILS)
    finally:
        os.killpg(proc.pid, signal.SIGTERM)
        try:
            code = proc.wait(timeout=30)
        finally:
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait()
    assert code == 0
    deadline = time.monotonic() + 10
    while any(Path(f"/proc/{pid}").exists() for pid in workers) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not [pid for pid in workers if Path(f"/proc/{pid}/status").exists()]


def test_several_workers_refused_on_sqlite(tmp_path: Path) -> None:
    env = os.environ | {"PHASEWARD_DATA_DIR": str(tmp_path), "PHASEWARD_AUTH_MODE": "open"}
    env.pop("PHASEWARD_DATABASE_URL", None)
    cmd = [sys.executable, "-m", "phaseward.cli", "serve", "--workers", "2", "--port", "1"]
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=60)
    assert done.returncode == 2
    assert "--workers above 1 needs PostgreSQL" in done.stderr
