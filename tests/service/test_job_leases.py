"""Issue 17 item 11: job leases. Two runners on one database stand for two servers: exactly
one runs each job, a starting server leaves a live server's jobs alone, and a job whose
server died is taken over once its lease has expired (the dead server's late result is
dropped)."""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from typing import Any

import pytest
from sqlalchemy.orm import Session, sessionmaker

from phaseward.monitor.jobs import JobRunner, Progress
from phaseward.settings import Settings
from phaseward.store import jobs
from phaseward.store.db import (
    build_engine,
    build_sessionmaker,
    close_engine,
    migrate,
    transaction,
)

LEASE_S = 0.6


class Recorder:
    """A job handler that notes which runner ran it and waits until released."""

    def __init__(self) -> None:
        self.runs: list[str] = []
        self.release = threading.Event()
        self.lock = threading.Lock()

    def handler(self, name: str) -> Any:
        def run(
            _: sessionmaker[Session], request: dict[str, Any], progress: Progress
        ) -> dict[str, Any]:
            with self.lock:
                self.runs.append(name)
            progress(10.0)
            assert self.release.wait(30)
            return {"by": name, "n": request["n"]}

        return run


@pytest.fixture
def sessions(settings: Settings) -> Iterator[sessionmaker[Session]]:
    engine = build_engine(settings)
    migrate(engine)
    yield build_sessionmaker(engine)
    close_engine(engine)  # once the runners' threads have returned their connections


def runner(sessions: sessionmaker[Session], recorder: Recorder, name: str) -> JobRunner:
    return JobRunner(sessions, {"test": recorder.handler(name)}, lease_s=LEASE_S)


def stored(sessions: sessionmaker[Session], job_id: int) -> tuple[str, dict[str, Any] | None]:
    with transaction(sessions) as session:
        job = jobs.get(session, job_id)
        assert job is not None
        return job.status, job.result


def wait_for(condition: Any, timeout_s: float = 20.0) -> None:
    deadline = time.monotonic() + timeout_s
    while not condition():
        assert time.monotonic() < deadline, "timed out"
        time.sleep(0.02)


def test_a_starting_server_leaves_a_live_servers_job_alone(
    sessions: sessionmaker[Session],
) -> None:
    rec = Recorder()
    first = runner(sessions, rec, "first")
    first.resume()
    job = first.submit("test", {"n": 1})
    wait_for(lambda: rec.runs == ["first"])
    second = runner(sessions, rec, "second")
    second.resume()  # the old behaviour re-ran every running job here
    time.sleep(LEASE_S * 3)  # several renewals and sweeps of both
    assert rec.runs == ["first"]
    rec.release.set()
    wait_for(lambda: stored(sessions, job.id)[0] == "done")
    assert stored(sessions, job.id)[1] == {"by": "first", "n": 1}
    assert rec.runs == ["first"]
    first.shutdown()
    second.shutdown()


def test_an_orphaned_job_is_taken_over_after_its_lease_expires(
    sessions: sessionmaker[Session],
) -> None:
    rec = Recorder()
    dead = runner(sessions, rec, "dead")
    dead.resume()
    job = dead.submit("test", {"n": 2})
    wait_for(lambda: rec.runs == ["dead"])
    dead.shutdown()  # stops renewing, as a killed server would; its worker thread still waits
    live = runner(sessions, rec, "live")
    live.resume()
    wait_for(lambda: rec.runs == ["dead", "live"])
    assert stored(sessions, job.id)[0] == "running"
    rec.release.set()  # both finish: only the lease holder's result counts
    wait_for(lambda: stored(sessions, job.id)[0] == "done")
    time.sleep(0.3)
    assert stored(sessions, job.id)[1] == {"by": "live", "n": 2}
    live.shutdown()


def test_two_servers_sweeping_at_once_run_each_orphan_once(
    sessions: sessionmaker[Session],
) -> None:
    with transaction(sessions) as session:
        ids = [
            jobs.add(
                session, kind="test", request={"n": n}, now_s=0.0, owner="gone", lease_until_s=1.0
            ).id
            for n in range(6)
        ]
    rec = Recorder()
    rec.release.set()
    a, b = runner(sessions, rec, "a"), runner(sessions, rec, "b")
    sweeps = [threading.Thread(target=r.sweep) for r in (a, b)]
    for t in sweeps:
        t.start()
    for t in sweeps:
        t.join()
    wait_for(lambda: all(stored(sessions, i)[0] == "done" for i in ids))
    assert len(rec.runs) == len(ids)
    a.shutdown()
    b.shutdown()


def test_shutdown_stops_a_running_job_at_its_next_progress_report(
    sessions: sessionmaker[Session],
) -> None:
    """A long job must not outlive its server's database pool (a job writing after the pool
    closed left a connection open); it stays stored unfinished so a live server reruns it."""
    started, ended = threading.Event(), threading.Event()

    def endless(_: sessionmaker[Session], request: dict[str, Any], progress: Progress) -> Any:
        started.set()
        try:
            while True:
                progress(50.0)
                time.sleep(0.01)
        finally:
            ended.set()

    server = JobRunner(sessions, {"test": endless}, lease_s=LEASE_S)
    server.resume()
    job = server.submit("test", {"n": 3})
    assert started.wait(20)
    server.shutdown()
    assert ended.is_set()  # shutdown returned only after the job had let go
    assert stored(sessions, job.id)[0] == "running"  # not failed: taken over once the lease ends
