"""Two ``phaseward serve`` replicas on one PostgreSQL schema, fed concurrently.

Four client threads post samples of one rail, each thread its own seq range, their times
interleaved (thread k holds steps k, k + 4, k + 8, ...) and every sample telling the same
story for its time: all phases sharing the load, then phase 1's breaker trips, it is restored,
phase 3's driver is disabled, and it is restored. A barrier per block of batches keeps the
threads within one block of each other, and each batch goes to one replica or the other.

Then: every acknowledged sample is stored once; every transition is recorded once (phase
events alternate, the rail's condition changes form one chain); and the recorded transitions
are exactly those of the same samples fed in time order to a single process.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import threading
import time
import uuid
from collections import Counter
from collections.abc import Callable, Iterator
from itertools import pairwise
from pathlib import Path
from typing import Any

import anyio
import httpx
import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url
from tests.factories import SMALL_RAIL, sample
from tests.servers import free_port

from phaseward.api.app import close, create_app
from phaseward.settings import Settings

pytestmark = pytest.mark.e2e
SERVER = os.environ.get(
    "PHASEWARD_TEST_DATABASE_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)
THREADS = 4
BATCH = 5  # samples per request
BLOCKS = 30  # batches per thread: 4 x 5 x 30 = 600 one-second steps
STEPS = THREADS * BATCH * BLOCKS
RAIL = "/v1/rails/bench-a"
Transition = tuple[str, int | None, Any]


def _reachable() -> bool:
    url = make_url(SERVER)
    try:
        with socket.create_connection((url.host or "127.0.0.1", url.port or 5432), timeout=1):
            return True
    except OSError:
        return False


@pytest.fixture
def new_schema() -> Iterator[Callable[[], str]]:
    """Makes fresh schemas on the test server and gives their URLs; drops them afterwards."""
    if not _reachable():
        pytest.skip(f"PostgreSQL is not reachable at {make_url(SERVER).render_as_string()}")
    pytest.importorskip("psycopg", reason="the postgres extra (psycopg) is not installed")
    admin = create_engine(SERVER, isolation_level="AUTOCOMMIT")
    made: list[str] = []

    def new() -> str:
        schema = f"r_{uuid.uuid4().hex[:16]}"
        with admin.connect() as conn:
            conn.execute(text(f"CREATE SCHEMA {schema}"))
        made.append(schema)
        query = {"options": f"-csearch_path={schema}"}
        return make_url(SERVER).update_query_dict(query).render_as_string(hide_password=False)

    try:
        yield new
    finally:
        with admin.connect() as conn:
            for schema in made:
                conn.execute(text(f"DROP SCHEMA {schema} CASCADE"))
        admin.dispose()


def serve(data_dir: Path, database_url: str) -> tuple[subprocess.Popen[bytes], str]:
    """``phaseward serve`` on ``database_url`` (does not wait for it)."""
    port = free_port()
    env = os.environ | {
        "PHASEWARD_DATA_DIR": str(data_dir),
        "PHASEWARD_DATABASE_URL": database_url,
        "PHASEWARD_PORT": str(port),
        "PHASEWARD_AUTH_MODE": "open",
        "PHASEWARD_LOG_LEVEL": "warning",
        "PHASEWARD_FUTURE_SKEW_S": "1e8",  # invented test data is dated 2027
    }
    proc = subprocess.Popen([sys.executable, "-m", "phaseward.cli", "serve"], env=env)
    return proc, f"http://127.0.0.1:{port}"


def wait_up(proc: subprocess.Popen[bytes], base: str) -> None:
    deadline = time.monotonic() + 60
    while True:
        try:
            if httpx.get(f"{base}/healthz", timeout=1).status_code == 200:
                return
        except httpx.TransportError:
            pass
        if proc.poll() is not None:
            raise AssertionError(f"the replica at {base} exited while starting: {proc.returncode}")
        if time.monotonic() > deadline:
            raise AssertionError(f"the replica at {base} did not come up within 60 s")
        time.sleep(0.1)


def story(step: int, seq: int) -> dict[str, Any]:
    """The sample at ``step`` (one second apart), with its client's ``seq``."""
    tripped = 120 <= step < 240
    disabled = 360 <= step < 480
    currents = [80.0 / 3] * 4
    if tripped:
        currents[1] = 0.0
    elif disabled:
        currents[3] = 0.0
    else:
        currents = [20.0] * 4
    body = sample(step, currents)
    body["seq"] = seq
    body["phases"][1]["breaker_tripped"] = tripped
    body["phases"][3]["driver_disabled"] = disabled
    return body


def thread_batches(k: int) -> list[list[dict[str, Any]]]:
    """Thread ``k``'s requests: its seqs k * 1e6 + n, its steps k, k + THREADS, ..."""
    steps = list(range(k, STEPS, THREADS))
    bodies = [story(step, k * 1_000_000 + n) for n, step in enumerate(steps)]
    return [bodies[i : i + BATCH] for i in range(0, len(bodies), BATCH)]


def transitions(events: list[dict[str, Any]]) -> Counter[Transition]:
    """What changed, without when: (kind, phase, new condition or cleared)."""
    out: Counter[Transition] = Counter()
    for e in events:
        d = e["details"]
        out[(e["kind"], e["phase"], d.get("to", d.get("cleared")))] += 1
    return out


def all_events(client: httpx.Client) -> list[dict[str, Any]]:
    page = client.get(f"{RAIL}/events", params={"limit": 1000})
    assert page.status_code == 200, page.text
    assert page.json()["next_cursor"] is None
    items: list[dict[str, Any]] = page.json()["items"]
    return sorted(items, key=lambda e: e["id"])


def reference(database_url: str, data_dir: Path) -> list[dict[str, Any]]:
    """The events of one process fed every sample in time order, in batches of BATCH."""
    settings = Settings(
        data_dir=data_dir, database_url=database_url, auth_mode="open", future_skew_s=1e8
    )
    app = create_app(settings)
    ordered = [story(step, step) for step in range(STEPS)]

    async def feed() -> list[dict[str, Any]]:
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://one") as c:
            assert (await c.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
            for i in range(0, STEPS, BATCH):
                answer = await c.post(f"{RAIL}/samples", json=ordered[i : i + BATCH])
                assert answer.status_code == 200, answer.text
            page = (await c.get(f"{RAIL}/events", params={"limit": 1000})).json()
            items: list[dict[str, Any]] = page["items"]
            return sorted(items, key=lambda e: e["id"])

    try:
        return anyio.run(feed)
    finally:
        close(app)


def test_two_replicas_store_every_sample_once_and_record_every_transition_once(
    new_schema: Callable[[], str], tmp_path: Path
) -> None:
    shared = new_schema()
    # Both replicas start at once on the fresh schema: both migrate it.
    replicas = [serve(tmp_path / f"replica-{n}", shared) for n in range(2)]
    try:
        for proc, base in replicas:
            wait_up(proc, base)
        bases = [base for _, base in replicas]
        created = httpx.post(f"{bases[0]}/v1/rails", json=SMALL_RAIL, timeout=30)
        assert created.status_code == 201, created.text

        acknowledged: list[int] = []
        answers: list[dict[str, Any]] = []
        failures: list[str] = []
        lock = threading.Lock()
        barrier = threading.Barrier(THREADS, timeout=120)

        def client(k: int) -> None:
            with httpx.Client(timeout=60) as c:
                for b, batch in enumerate(thread_batches(k)):
                    try:
                        barrier.wait()
                    except threading.BrokenBarrierError:
                        return
                    base = bases[(b + k) % 2]
                    answer = c.post(f"{base}{RAIL}/samples", json=batch)
                    with lock:
                        if answer.status_code != 200:
                            failures.append(f"thread {k} batch {b}: {answer.text}")
                            barrier.abort()
                            return
                        acknowledged.extend(s["seq"] for s in batch)
                        answers.append(answer.json())

        threads = [threading.Thread(target=client, args=(k,)) for k in range(THREADS)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=600)
        assert not any(t.is_alive() for t in threads), "a client thread did not finish"
        assert failures == []
        assert len(acknowledged) == STEPS

        with httpx.Client(base_url=bases[1], timeout=30) as c:
            events = all_events(c)
            status = c.get(f"{RAIL}/status").json()
    finally:
        for proc, _ in replicas:
            proc.terminate()
        for proc, _ in replicas:
            proc.wait(timeout=30)

    # Every acknowledged sample stored exactly once, and the answers add up.
    engine = create_engine(shared)
    with engine.connect() as conn:
        stored = Counter(conn.execute(text("SELECT seq FROM samples")).scalars())
    engine.dispose()
    assert max(stored.values()) == 1
    assert set(stored) == set(acknowledged)
    assert sum(a["stored"] for a in answers) == STEPS
    assert sum(a["duplicates"] for a in answers) == 0
    assert status["last_sample"]["time_s"] == sample(STEPS - 1, [0.0])["time"]

    # Every transition once: phase events alternate, condition changes chain.
    assert [e for e in events if e["kind"] == "telemetry.rejected"] == []
    by_watch: dict[tuple[str, int | None], list[bool]] = {}
    for e in events:
        if e["kind"] in ("phase.isolated", "phase.restored"):
            by_watch.setdefault(("phase", e["phase"]), []).append(e["kind"] == "phase.isolated")
        elif "cleared" in e["details"]:
            by_watch.setdefault((e["kind"], e["phase"]), []).append(not e["details"]["cleared"])
    for watch, states in by_watch.items():
        assert all(a != b for a, b in pairwise(states)), (watch, states)
    chain = [e["details"] for e in events if e["kind"] == "rail.condition"]
    assert chain[0]["from"] is None
    assert all(a["to"] == b["from"] for a, b in pairwise(chain)), chain

    # None lost: the same transitions as one process fed in order.
    expected = transitions(reference(new_schema(), tmp_path / "single"))
    assert expected[("phase.isolated", 1, "isolated")] == 1
    assert expected[("phase.isolated", 3, "isolated")] == 1
    assert transitions(events) == expected


RAILS = 6
FLICKER_STEPS = 240  # per rail
FLICKER_BATCH = 2


def flicker(step: int) -> dict[str, Any]:
    """A rail whose phase 2 breaker trips for 4 s out of every 8: many events per rail."""
    tripped = step % 8 >= 4
    currents = [80.0 / 3] * 4 if tripped else [20.0] * 4
    if tripped:
        currents[2] = 0.0
    body = sample(step, currents)
    body["phases"][2]["breaker_tripped"] = tripped
    return body


def follow(base: str, got: list[int], done: threading.Event, deadline: float) -> None:
    """Read the stream in pieces of 40 events, resuming each with Last-Event-ID, until
    ``done`` is set and the stream has been quiet for a while (or the deadline)."""
    last: str | None = "0"
    while time.monotonic() < deadline:
        headers = {"last-event-id": last} if last is not None else {}
        try:
            with httpx.stream(
                "GET", f"{base}/v1/events/stream", params={"limit": 40}, headers=headers,
                timeout=httpx.Timeout(30, read=3),
            ) as answer:  # fmt: skip
                for line in answer.iter_lines():
                    if line.startswith("id: "):
                        last = line[4:]
                        got.append(int(last))
        except httpx.ReadTimeout:
            if done.is_set():
                return


def test_the_stream_hands_out_every_event_of_many_rails_fed_through_two_replicas(
    new_schema: Callable[[], str], tmp_path: Path
) -> None:
    """Issue 17 item 1: transactions for different rails commit out of id order; each
    replica's stream, resumed with Last-Event-ID every 40 events, equals the events table."""
    shared = new_schema()
    replicas = [serve(tmp_path / f"replica-{n}", shared) for n in range(2)]
    try:
        for proc, base in replicas:
            wait_up(proc, base)
        bases = [base for _, base in replicas]
        for k in range(RAILS):
            spec = {**SMALL_RAIL, "id": f"r{k}"}
            assert httpx.post(f"{bases[0]}/v1/rails", json=spec, timeout=30).status_code == 201
        done = threading.Event()
        deadline = time.monotonic() + 600
        streams: list[list[int]] = [[], []]
        readers = [
            threading.Thread(target=follow, args=(base, got, done, deadline))
            for base, got in zip(bases, streams, strict=True)
        ]
        failures: list[str] = []

        def feed(k: int) -> None:
            with httpx.Client(timeout=60) as c:
                for n, i in enumerate(range(0, FLICKER_STEPS, FLICKER_BATCH)):
                    batch = [flicker(s) for s in range(i, i + FLICKER_BATCH)]
                    answer = c.post(f"{bases[(n + k) % 2]}/v1/rails/r{k}/samples", json=batch)
                    if answer.status_code != 200:
                        failures.append(answer.text)
                        return

        feeders = [threading.Thread(target=feed, args=(k,)) for k in range(RAILS)]
        for t in [*readers, *feeders]:
            t.start()
        for t in feeders:
            t.join(timeout=600)
        done.set()
        for t in readers:
            t.join(timeout=600)
        assert failures == []
        engine = create_engine(shared)
        with engine.connect() as conn:
            stored = sorted(conn.execute(text("SELECT id FROM events")).scalars())
        engine.dispose()
    finally:
        for proc, _ in replicas:
            proc.terminate()
        for proc, _ in replicas:
            proc.wait(timeout=30)
    assert len(stored) > RAILS * FLICKER_STEPS // 8  # several events per flicker period
    for got in streams:
        assert len(got) == len(set(got)), "an event was streamed twice"
        assert sorted(got) == stored, f"missing: {sorted(set(stored) - set(got))[:20]}"
