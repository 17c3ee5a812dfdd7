"""Real ``phaseward serve`` processes on free loopback ports, for end-to-end tests."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from collections.abc import Mapping
from pathlib import Path

import httpx


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def start_server(
    data_dir: Path, port: int, extra_env: Mapping[str, str] | None = None
) -> subprocess.Popen[bytes]:
    """Start the service on the embedded SQLite default in ``data_dir``; wait until it answers.
    ``extra_env`` adds settings (``PHASEWARD_...`` variables)."""
    env = os.environ | {
        "PHASEWARD_DATA_DIR": str(data_dir),
        "PHASEWARD_PORT": str(port),
        "PHASEWARD_LOG_LEVEL": "warning",
        "PHASEWARD_AUTH_MODE": "open",
        "PHASEWARD_FUTURE_SKEW_S": "1e8",  # invented test data is dated 2027
        **(extra_env or {}),
    }
    env.pop("PHASEWARD_DATABASE_URL", None)
    proc = subprocess.Popen([sys.executable, "-m", "phaseward.cli", "serve"], env=env)
    wait_until_healthy(proc, port)
    return proc


def wait_until_healthy(proc: subprocess.Popen[bytes], port: int) -> None:
    """Wait until ``proc`` answers GET /healthz on ``port`` (at most 30 s)."""
    deadline = time.monotonic() + 30
    while True:
        try:
            if httpx.get(f"http://127.0.0.1:{port}/healthz", timeout=1).status_code == 200:
                return
        except httpx.TransportError:
            pass
        if proc.poll() is not None:
            raise RuntimeError("the server exited while starting")
        if time.monotonic() > deadline:
            proc.kill()
            raise RuntimeError("the server did not come up within 30 s")
        time.sleep(0.1)
