"""Durability: SIGKILL the real server while several clients post samples, restart it, and
check that every acknowledged sample is stored once, and the database is intact."""

from __future__ import annotations

import signal
import sqlite3
import threading
import time
from pathlib import Path

import httpx
import pytest
from tests.factories import SMALL_RAIL, sample
from tests.servers import free_port, start_server

pytestmark = pytest.mark.e2e
CLIENTS = 3
BATCH = 5


def test_sigkill_mid_stream_loses_no_acknowledged_sample(tmp_path: Path) -> None:
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    proc = start_server(tmp_path, port)
    httpx.post(f"{base}/v1/rails", json=SMALL_RAIL).raise_for_status()
    acknowledged: set[int] = set()
    lock = threading.Lock()
    stop = threading.Event()

    def post_forever(client_no: int) -> None:
        seq = client_no * 1_000_000
        with httpx.Client(base_url=base, timeout=5) as c:
            while not stop.is_set() and seq < client_no * 1_000_000 + 5_000:
                body = [sample(seq + k, [20.0] * 4) for k in range(BATCH)]
                try:
                    answer = c.post("/v1/rails/bench-a/samples", json=body)
                except httpx.TransportError:
                    return  # the server is gone: what was not answered was not acknowledged
                if answer.status_code == 200:
                    with lock:
                        acknowledged.update(seq + k for k in range(BATCH))
                seq += BATCH

    threads = [threading.Thread(target=post_forever, args=(n + 1,)) for n in range(CLIENTS)]
    for t in threads:
        t.start()
    deadline = time.monotonic() + 20
    while len(acknowledged) < 300 and time.monotonic() < deadline:
        time.sleep(0.05)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=10)
    stop.set()
    for t in threads:
        t.join(timeout=10)
    assert len(acknowledged) >= 300, "too few samples were posted before the kill"

    database = tmp_path / "phaseward.db"
    with sqlite3.connect(database) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        stored = [row[0] for row in conn.execute("SELECT seq FROM samples")]
    assert len(stored) == len(set(stored))
    assert acknowledged <= set(stored)

    proc = start_server(tmp_path, port)
    try:
        resend = sorted(acknowledged)[:BATCH]
        answer = httpx.post(
            f"{base}/v1/rails/bench-a/samples", json=[sample(s, [20.0] * 4) for s in resend]
        )
        assert answer.status_code == 200, answer.text
        assert answer.json()["duplicates"] == BATCH
        assert answer.json()["stored"] == 0
    finally:
        proc.terminate()
        proc.wait(timeout=20)
