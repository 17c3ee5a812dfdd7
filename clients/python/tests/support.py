"""Shared test helpers: a small rail, samples for it, a real service in a subprocess, and
transports that inject failures in front of the real service (invented values, tests only)."""

from __future__ import annotations

import collections
import copy
import os
import socket
import subprocess
import sys
import threading
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx

REPO = Path(__file__).resolve().parents[3]

SMALL_RAIL: dict[str, Any] = {
    "name": "four-phase client test rail",
    "vin_v": 12.0,
    "vout_v": 1.0,
    "switching_hz": 500e3,
    "load_a": 90.0,
    "ambient_c": 25.0,
    "phase_count": 4,
    "phase": {
        "rated_current_a": 30.0,
        "overcurrent_limit_a": 40.0,
        "junction_limit_c": 125.0,
        "warning_margin_k": 10.0,
        "inductor": {"inductance_h": 220e-9, "dcr_ohm": 0.3e-3},
        "power_stage": {
            "rds_high_ohm": 5e-3,
            "rds_low_ohm": 1.5e-3,
            "rise_time_s": 5e-9,
            "fall_time_s": 5e-9,
            "gate_charge_c": 20e-9,
            "dead_time_s": 20e-9,
        },
        "core_loss_w": 0.2,
        "thermal": [{"r_k_per_w": 2.0, "tau_s": 0.5}, {"r_k_per_w": 6.0, "tau_s": 20.0}],
    },
    "board": {"to_ambient_k_per_w": 1.0, "capacitance_j_per_k": 200.0},
    "monitor": {"debounce_samples": 2},
}

T0 = 1.8e9  # epoch seconds of the first sample (2027)


def new_rail_id(prefix: str = "t") -> str:
    return f"{prefix}-{uuid.uuid4().hex[:12]}"


def rail_definition(rail_id: str, **changes: Any) -> dict[str, Any]:
    spec = copy.deepcopy(SMALL_RAIL)
    spec.update(changes)
    spec["id"] = rail_id
    return spec


def sample(
    seq: int | None,
    currents: list[float],
    *,
    t0: float = T0,
    at: float | None = None,
    temps: float = 60.0,
    tripped: int | None = None,
) -> dict[str, Any]:
    """A JSON sample; ``at`` overrides the time (default ``t0 + seq``)."""
    phases: list[dict[str, Any]] = [
        {"index": i, "current_a": c, "temp_c": temps} for i, c in enumerate(currents)
    ]
    if tripped is not None:
        phases[tripped]["breaker_tripped"] = True
    time_s = at if at is not None else t0 + (seq or 0)
    out: dict[str, Any] = {"time": time_s, "vin_v": 12.0, "vout_v": 1.0, "phases": phases}
    if seq is not None:
        out["seq"] = seq
    return out


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def start_service(data_dir: Path, port: int) -> subprocess.Popen[bytes]:
    """``phaseward serve`` of this repository on a loopback port with its own data dir."""
    env = dict(os.environ)
    env.pop("PHASEWARD_DATABASE_URL", None)
    env |= {
        "PHASEWARD_DATA_DIR": str(data_dir),
        "PHASEWARD_PORT": str(port),
        "PHASEWARD_HOST": "127.0.0.1",
        "PHASEWARD_LOG_LEVEL": "warning",
        "PHASEWARD_AUTH_MODE": "open",
        "PHASEWARD_SQLITE_SYNCHRONOUS": "NORMAL",
        "PHASEWARD_FUTURE_SKEW_S": "1e8",  # invented test data is dated 2027
        "PYTHONPATH": os.pathsep.join(
            p for p in (str(REPO / "service"), env.get("PYTHONPATH", "")) if p
        ),
    }
    return subprocess.Popen([sys.executable, "-m", "phaseward.cli", "serve"], env=env)


def wait_healthy(proc: subprocess.Popen[bytes], base: str, timeout_s: float = 60.0) -> None:
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            if httpx.get(f"{base}/healthz", timeout=1).status_code == 200:
                return
        except httpx.TransportError:
            pass
        if proc.poll() is not None:
            raise RuntimeError(f"phaseward exited with {proc.returncode} before it served")
        if time.monotonic() > deadline:
            raise RuntimeError("phaseward did not come up")
        time.sleep(0.1)


def running_service(data_dir: Path) -> Iterator[str]:
    port = free_port()
    proc = start_service(data_dir, port)
    base = f"http://127.0.0.1:{port}"
    try:
        wait_healthy(proc, base)
        yield base
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def refusal(status: int, retry_after: str | None = None) -> httpx.Response:
    headers = {"retry-after": retry_after} if retry_after is not None else {}
    body = {"error": "busy", "detail": "scripted refusal", "field": None}
    return httpx.Response(status, headers=headers, json=body)


class Script:
    """Steps for the next requests: ``"pass"`` (to the real service), ``"connect"`` (a
    refused connection), ``"lose"`` (the service gets and stores the request, the answer is
    lost: a read timeout), ``"block"`` (wait for ``release`` then pass), or ``(status,
    retry_after)`` (a refusal made up here). When the steps run out, everything passes."""

    def __init__(self, *steps: str | tuple[int, str | None]) -> None:
        self.steps: collections.deque[str | tuple[int, str | None]] = collections.deque(steps)
        self.seen: list[str | tuple[int, str | None]] = []
        self.release = threading.Event()
        self.lock = threading.Lock()

    def next(self) -> str | tuple[int, str | None]:
        with self.lock:
            step = self.steps.popleft() if self.steps else "pass"
            self.seen.append(step)
            return step


class ScriptedTransport(httpx.BaseTransport):
    def __init__(self, script: Script) -> None:
        self.script = script
        self.inner = httpx.HTTPTransport()

    def handle_request(self, request: httpx.Request) -> httpx.Response:
        step = self.script.next()
        if isinstance(step, tuple):
            return refusal(*step)
        if step == "connect":
            raise httpx.ConnectError("scripted: connection refused", request=request)
        if step == "block":
            self.script.release.wait(30)
        response = self.inner.handle_request(request)
        if step == "lose":
            response.read()
            response.close()
            raise httpx.ReadTimeout("scripted: the answer was lost", request=request)
        return response

    def close(self) -> None:
        self.inner.close()


class AsyncScriptedTransport(httpx.AsyncBaseTransport):
    def __init__(self, script: Script) -> None:
        self.script = script
        self.inner = httpx.AsyncHTTPTransport()

    async def handle_async_request(self, request: httpx.Request) -> httpx.Response:
        import asyncio

        step = self.script.next()
        if isinstance(step, tuple):
            return refusal(*step)
        if step == "connect":
            raise httpx.ConnectError("scripted: connection refused", request=request)
        if step == "block":
            while not self.script.release.is_set():
                await asyncio.sleep(0.01)
        response = await self.inner.handle_async_request(request)
        if step == "lose":
            await response.aread()
            await response.aclose()
            raise httpx.ReadTimeout("scripted: the answer was lost", request=request)
        return response

    async def aclose(self) -> None:
        await self.inner.aclose()


def wait_until(predicate: Any, timeout_s: float = 10.0) -> None:
    deadline = time.monotonic() + timeout_s
    while not predicate():
        if time.monotonic() > deadline:
            raise AssertionError("condition not reached in time")
        time.sleep(0.01)


def open_phase_csv() -> bytes:
    """An invented capture at 20 MSa/s: phase 1 carries 20 A and its path opens 1 us before
    the trigger; the others take its share; input current and voltages stay put."""
    rows = ["t_s,vin_v,vout_v,iin_a,i0_a,i1_a,i2_a,i3_a"]
    for k in range(-1000, 400):
        t = k * 50e-9
        lost = t >= -1e-6
        other = 80.0 / 3 if lost else 20.0
        rows.append(f"{t:.9g},12,1,6.7,{other},{0.0 if lost else 20.0},{other},{other}")
    return "\n".join(rows).encode()
