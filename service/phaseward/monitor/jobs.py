"""Background jobs: a small worker pool that runs long computations and keeps their progress
and result in the database, so a client can poll, and fetch the result again later.

A job left queued or running by a stopped process is run again at the next start: handlers
are pure functions of the stored request, so a rerun gives the same result.

Short jobs do not queue behind long ones: a job whose stated cost (for a rehearsal, its number
of combinations) is at most ``SHORT_COST`` runs in a lane of its own.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
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


class JobRunner:
    def __init__(
        self, sessions: sessionmaker[Session], handlers: Mapping[str, Handler], *, workers: int = 1
    ) -> None:
        self._sessions = sessions
        self._handlers = dict(handlers)
        self._pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="phaseward-job")
        self._short = ThreadPoolExecutor(max_workers=1, thread_name_prefix="phaseward-short-job")

    def submit(self, kind: str, request: dict[str, Any], *, cost: int = SHORT_COST + 1) -> Job:
        with transaction(self._sessions) as session:
            job = jobs.add(session, kind=kind, request=request, now_s=time.time())
        (self._short if cost <= SHORT_COST else self._pool).submit(self._run, job.id)
        return job

    def resume(self) -> None:
        with transaction(self._sessions) as session:
            waiting = jobs.unfinished(session)
        for job_id in waiting:
            self._pool.submit(self._run, job_id)

    def shutdown(self) -> None:
        self._pool.shutdown(wait=False, cancel_futures=True)
        self._short.shutdown(wait=False, cancel_futures=True)

    def _run(self, job_id: int) -> None:
        with transaction(self._sessions) as session:
            job = jobs.get(session, job_id)
            if job is None:
                return
            kind, request = job.kind, job.request
            jobs.set_progress(session, job_id, status="running", percent=0.0)
        last = [0.0]

        def progress(percent: float) -> None:
            now = time.monotonic()
            if now - last[0] >= PROGRESS_EVERY_S:
                last[0] = now
                with transaction(self._sessions) as s:
                    jobs.set_progress(s, job_id, status="running", percent=min(percent, 99.9))

        result: dict[str, Any] | None = None
        error: str | None = None
        try:
            result = self._handlers[kind](self._sessions, request, progress)
        except (PhasewardError, ValueError, ArithmeticError) as err:
            error = str(err)
        except Exception as err:  # a job must end in a state a client can read
            log.exception("job %s failed", job_id)
            error = f"internal error: {type(err).__name__}"
        with transaction(self._sessions) as session:
            jobs.finish(session, job_id, result=result, error=error, now_s=time.time())
