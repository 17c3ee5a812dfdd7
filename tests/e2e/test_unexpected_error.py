"""Issue 17 item 9: an unexpected error answers the documented JSON shape with 500, and the
connection stays usable for the client's next request (a real server, one raw socket)."""

from __future__ import annotations

import json
import socket
import threading
import time
from collections.abc import Iterator

import pytest
import uvicorn
from fastapi import FastAPI
from tests.servers import free_port

from phaseward.api import deps
from phaseward.api.app import create_app
from phaseward.settings import Settings

pytestmark = pytest.mark.e2e


def _broken_session() -> Iterator[None]:
    raise RuntimeError("a defect nobody foresaw")
    yield  # pragma: no cover - a generator dependency, like the one it stands in for


@pytest.fixture
def server(settings: Settings) -> Iterator[int]:
    app: FastAPI = create_app(settings)
    app.dependency_overrides[deps._read_session] = _broken_session
    port = free_port()
    config = uvicorn.Config(app, host="127.0.0.1", port=port, log_level="critical")
    running = uvicorn.Server(config)
    thread = threading.Thread(target=running.run)
    thread.start()
    deadline = time.monotonic() + 30
    while not running.started and time.monotonic() < deadline:
        time.sleep(0.05)
    yield port
    running.should_exit = True
    thread.join(timeout=30)


def _exchange(conn: socket.socket, path: str) -> tuple[int, dict[str, str], bytes]:
    conn.sendall(f"GET {path} HTTP/1.1\r\nHost: phaseward.test\r\n\r\n".encode())
    data = b""
    while b"\r\n\r\n" not in data:
        chunk = conn.recv(65536)
        assert chunk, "the server closed the connection"
        data += chunk
    head, body = data.split(b"\r\n\r\n", 1)
    lines = head.decode().split("\r\n")
    headers = dict(line.split(": ", 1) for line in lines[1:])
    headers = {k.lower(): v for k, v in headers.items()}
    length = int(headers["content-length"])
    while len(body) < length:
        chunk = conn.recv(65536)
        assert chunk, "the server closed the connection"
        body += chunk
    return int(lines[0].split()[1]), headers, body


def test_a_500_is_json_and_the_connection_carries_the_next_request(server: int) -> None:
    with socket.create_connection(("127.0.0.1", server), timeout=10) as conn:
        status, headers, body = _exchange(conn, "/v1/rails/any")  # reads in a session
        assert status == 500
        assert headers["content-type"] == "application/json"
        answer = json.loads(body)
        assert answer["error"] == "internal_error"
        assert set(answer) == {"error", "detail", "field"}
        assert "RuntimeError" not in answer["detail"]  # no internals to the client
        status, _, body = _exchange(conn, "/healthz")  # the same connection
        assert status == 200
        assert json.loads(body)["status"] == "ok"
