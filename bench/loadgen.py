"""A lean HTTP/1.1 load generator on loopback, run in its own process so that its work does not
share a GIL with the server or the benchmark driver.

Keep-alive connections post pre-built bodies (or GET paths) back to back (closed loop: the
most the server gives), or paced to a total rate (open loop, for "80 % of the maximum").
Raw asyncio streams instead of an HTTP client library: per request the client costs a few
tens of microseconds, so on 2 cores the server, not the client, sets the pace.

Driver side: ``run(config)`` starts ``python -m bench.loadgen`` with the config as JSON on
stdin and returns its JSON result (counts, status codes and latencies).
"""

from __future__ import annotations

import asyncio
import json
import subprocess
import sys
import time
from dataclasses import dataclass
from typing import Any

PHASES = 12


def sample(seq: int, t0: float) -> dict[str, Any]:
    """One sample of a 12-phase rail sharing 240 A, at 100 Hz."""
    phases = [
        {"index": i, "current_a": 20.0 + 0.1 * (i % 3), "temp_c": 60.0 + 0.01 * (seq % 50)}
        for i in range(PHASES)
    ]
    return {"time": t0 + seq * 0.01, "seq": seq, "vin_v": 12.0, "vout_v": 1.0, "phases": phases}


def bodies(
    connection: int, connections: int, count: int, per_request: int, t0: float, first_seq: int = 0
) -> list[str]:
    """The request bodies of one of ``connections`` connections, ``per_request`` samples each
    (one object when 1), numbered from ``first_seq``. Connections take turns along one time
    line, so samples arrive roughly in time order, as one rail's telemetry fanned out."""
    out = []
    for k in range(count):
        start = first_seq + (k * connections + connection) * per_request
        items = [sample(start + j, t0) for j in range(per_request)]
        out.append(json.dumps(items[0] if per_request == 1 else items))
    return out


@dataclass(frozen=True)
class Stream:
    """What one connection sends: POST bodies in turn, or GETs cycling over ``paths``."""

    paths: list[str]
    bodies: list[bytes] | None = None
    content_type: str = "application/json"


async def _connection(
    port: int, stream: Stream, stop_at: float, interval_s: float | None, first_at: float,
    latencies: list[float], statuses: dict[int, int],
) -> None:  # fmt: skip
    reader, writer = await asyncio.open_connection("127.0.0.1", port)
    k = 0
    next_at = first_at
    try:
        while time.perf_counter() < stop_at and (stream.bodies is None or k < len(stream.bodies)):
            if interval_s is not None:  # open loop: keep the schedule, do not wait for replies
                delay = next_at - time.perf_counter()
                if delay > 0:
                    await asyncio.sleep(delay)
                next_at += interval_s
            path = stream.paths[k % len(stream.paths)]
            if stream.bodies is None:
                head = f"GET {path} HTTP/1.1\r\nhost: bench\r\n\r\n".encode()
                request = head
            else:
                body = stream.bodies[k]
                request = (
                    f"POST {path} HTTP/1.1\r\nhost: bench\r\n"
                    f"content-type: {stream.content_type}\r\n"
                    f"content-length: {len(body)}\r\n\r\n"
                ).encode() + body
            started = time.perf_counter()
            writer.write(request)
            head_bytes = await reader.readuntil(b"\r\n\r\n")
            lines = head_bytes.decode("latin-1").split("\r\n")
            status = int(lines[0].split()[1])
            length = next(
                (int(v) for n, _, v in (x.partition(":") for x in lines[1:])
                 if n.lower() == "content-length"), 0,
            )  # fmt: skip
            if length:
                await reader.readexactly(length)
            latencies.append(time.perf_counter() - started)
            statuses[status] = statuses.get(status, 0) + 1
            k += 1
    finally:
        writer.close()


async def _main(config: dict[str, Any]) -> dict[str, Any]:
    port, duration = int(config["port"]), float(config["duration_s"])
    streams = [Stream(s["paths"], [b.encode() for b in s["bodies"]] if s.get("bodies") else None,
                      s.get("content_type", "application/json"))
               for s in config["streams"]]  # fmt: skip
    rate = config.get("rate_per_s")
    interval = len(streams) / float(rate) if rate else None
    latencies: list[list[float]] = [[] for _ in streams]
    statuses: dict[int, int] = {}
    started = time.perf_counter()
    stop_at = started + duration
    # Paced connections start evenly spread over one interval, as independent senders (racks
    # on clocks of their own) are: the offered load is even in time, not one burst of every
    # connection at the same instant each interval.
    offset = (interval or 0.0) / len(streams)
    await asyncio.gather(*(
        _connection(port, s, stop_at, interval, started + c * offset, lat, statuses)
        for c, (s, lat) in enumerate(zip(streams, latencies, strict=True))
    ))  # fmt: skip
    return {
        "elapsed_s": time.perf_counter() - started,
        "latencies_s": latencies,
        "statuses": {str(k): v for k, v in statuses.items()},
    }


def run(config: dict[str, Any]) -> dict[str, Any]:
    """Run one load in a child process; ``streams`` is a list of {paths, bodies?,
    content_type?} (bodies as text, JSON by default), ``rate_per_s`` (optional) paces all
    streams together."""
    done = subprocess.run(
        [sys.executable, "-m", "bench.loadgen"], input=json.dumps(config).encode(),
        capture_output=True, check=True,
    )  # fmt: skip
    result: dict[str, Any] = json.loads(done.stdout)
    return result


if __name__ == "__main__":
    print(json.dumps(asyncio.run(_main(json.load(sys.stdin)))))
