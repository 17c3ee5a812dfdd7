"""Background jobs: a small worker pool that runs long computations and keeps their progress
and result in the database, so a client can poll, and fetch the result again later.

Several servers may share one database, so each job carries a lease: the server that queued
or runs it renews the lease every third of ``lease_s`` while it is alive. A job whose lease
has expired (its server stopped or died) is taken over by whichever live server sweeps first
(PostgreSQL row locks with SKIP LOCKED make the claim exclusive) and run again from the start:
handlers are pure functions of the stored request, so a rerun gives the same result. Progress
and results are written only while the lease is held, so a server that lost a job to another
writes nothing. Leases compare the servers' wall clocks: keep them in sync (NTP).

Short jobs do not queue behind long ones: a job whose stated cost (for a rehearsal, its number
of combinations) is at most ``SHORT_COST`` runs in a lane of its own.
"""

from __future__ import annotations

import logging
import threading
import time
import uuid
from collections.abc import Callable, Mapping
from concurrent.futures import Future, ThreadPoolExecutor, wait
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import PhasewardError
from phaseward.store import jobs
from phaseward.store.db import transaction
from phaseward.store.models import Job

Progress = Callable[[float], None]
Handler = Callable[[sessionmaker[Session], dict[str, Any], Progress], dict[str, Any]]
PROGRESS_EVERY_S = 0.5  # progress is written at most this often
SHORT_COST = 100  # jobs up to this cost take the short lane (our choice)

log = logging.getLogger(__name__)


class _Stopping(Exception):
    """The runner is shutting down: the job is left unfinished; once its lease expires a live
    server reruns it from the start."""


class JobRunner:
    def __init__(
        self, sessions: sessionmaker[Session], handlers: Mapping[str, Handler], *,
        workers: int = 1, lease_s: float = 30.0,
    ) -> None:  # fmt: skip
        self._sessions = sessions
        self._handlers = dict(handlers)
        self._pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="phaseward-job")
        self._short = ThreadPoolExecutor(max_workers=1, thread_name_prefix="phaseward-short-job")
        self.owner = uuid.uuid4().hex  # this runner, as lease holder
        self.lease_s = lease_s
        self._stop = threading.Event()
        self._keeper = threading.Thread(target=self._keep, name="phaseward-leases", daemon=True)
        self._running: set[Future[None]] = set()

    def submit(self, kind: str, request: dict[str, Any], *, cost: int = SHORT_COST + 1) -> Job:
        now = time.time()
        with transaction(self._sessions) as session:
            job = jobs.add(session, kind=kind, request=request, now_s=now, owner=self.owner,
                           lease_until_s=now + self.lease_s)  # fmt: skip
        self._start(self._short if cost <= SHORT_COST else self._pool, job.id)
        return job

    def _start(self, pool: ThreadPoolExecutor, job_id: int) -> None:
        future = pool.submit(self._run, job_id)
        self._running.add(future)
        future.add_done_callback(self._running.discard)

    def resume(self) -> None:
        """Take over the jobs no live server holds, and keep sweeping and renewing."""
        self.sweep()
        self._keeper.start()

    def sweep(self) -> None:
        """Claim every job whose lease has expired and run it here."""
        with transaction(self._sessions) as session:
            waiting = jobs.orphans(session, now_s=time.time())
        for job_id in waiting:
            if self._claim(job_id):
                self._start(self._pool, job_id)

    def shutdown(self) -> None:
        """Stop renewing and sweeping, drop queued jobs and stop running ones at their next
        progress report, so no job holds a connection once the database pool closes. The
        jobs stay stored unfinished: once their lease expires a live server takes them over."""
        self._stop.set()
        if self._keeper.is_alive():  # let a renewal under way return its connection
            self._keeper.join(timeout=self.lease_s)
        self._pool.shutdown(wait=False, cancel_futures=True)
        self._short.shutdown(wait=False, cancel_futures=True)
        wait(list(self._running), timeout=self.lease_s)

    def _keep(self) -> None:
        while not self._stop.wait(self.lease_s / 3):
            try:
                with transaction(self._sessions) as session:
                    jobs.renew(session, owner=self.owner, until_s=time.time() + self.lease_s)
                self.sweep()
            except Exception:  # a database hiccup: try again next round
                log.exception("renewing job leases failed")

    def _claim(self, job_id: int) -> bool:
        now = time.time()
        with transaction(self._sessions) as session:
            job = jobs.claim(session, job_id, owner=self.owner, now_s=now,
                             until_s=now + self.lease_s)  # fmt: skip
            return job is not None

    def _run(self, job_id: int) -> None:
        owner = self.owner
        now = time.time()
        with transaction(self._sessions) as session:
            job = jobs.claim(session, job_id, owner=owner, now_s=now, until_s=now + self.lease_s)
            if job is None:  # finished, or another server holds it
                return
            kind, request = job.kind, job.request
            jobs.set_progress(session, job_id, owner=owner, status="running", percent=0.0)
        last = [0.0]

        def progress(percent: float) -> None:
            if self._stop.is_set():
                raise _Stopping
            now = time.monotonic()
            if now - last[0] >= PROGRESS_EVERY_S:
                last[0] = now
                with transaction(self._sessions) as s:
                    jobs.set_progress(s, job_id, owner=owner, status="running",
                                      percent=min(percent, 99.9))  # fmt: skip

        result: dict[str, Any] | None = None
        error: str | None = None
        try:
            result = self._handlers[kind](self._sessions, request, progress)
        except _Stopping:
            return
        except (PhasewardError, ValueError, ArithmeticError) as err:
            error = str(err)
        except Exception as err:  # a job must end in a state a client can read
            log.exception("job %s failed", job_id)
            error = f"internal error: {type(err).__name__}"
        with transaction(self._sessions) as session:
            jobs.finish(session, job_id, owner=owner, result=result, error=error,
                        now_s=time.time())  # fmt: skip
