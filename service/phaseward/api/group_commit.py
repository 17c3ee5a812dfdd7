"""Group commit: concurrent ingest requests share one transaction, across rails.

While one group is being stored, the requests that arrive queue up; when it commits, all of
them go as the next group: one durable commit for many requests, whichever rails they are
for (a fleet of rails each posting single samples has every request for another rail). The
requests of one rail in a group share that rail's monitor pass; each rail keeps its own.
With no concurrency a request is its own group and waits for nothing. Every request is
answered only after the commit that stored its samples, and keeps its own all-or-nothing
outcome (:func:`~phaseward.monitor.ingest.ingest_rails`).
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Sequence
from functools import partial

from fastapi.concurrency import run_in_threadpool
from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import NotFound
from phaseward.monitor.ingest import TUNING, IngestResult, Tuning, ingest_rails
from phaseward.monitor.telemetry import IncomingSamples

_log = logging.getLogger(__name__)
_Queued = list[tuple[str, IncomingSamples, "asyncio.Future[IngestResult]"]]


class GroupCommit:
    """At most one group in flight and one forming; a group holds at most ``max_samples``
    samples (a larger single request still goes alone). Requests of one rail keep their
    order: once one has to wait for the next group, every later request waits too."""

    def __init__(
        self,
        sessions: sessionmaker[Session],
        max_samples: int,
        *,
        tuning: Tuning = TUNING,
    ) -> None:
        self._sessions = sessions
        self._max = max_samples
        self._tuning = tuning
        self._queue: _Queued = []
        self._task: asyncio.Task[None] | None = None

    async def submit(self, rail_id: str, incoming: IncomingSamples) -> IngestResult:
        done: asyncio.Future[IngestResult] = asyncio.get_running_loop().create_future()
        self._queue.append((rail_id, incoming, done))
        if self._task is None:  # nothing in flight: this request starts a drain
            self._task = asyncio.create_task(self._drain())
        return await done

    async def settle(self, rail_ids: Sequence[str]) -> None:
        """Judge what these rails have waiting, in the queue like any request (one writer);
        a rail that fails is logged and stays waiting for the next call. Passes run ahead
        (:func:`~phaseward.monitor.ingest.judge_ahead`) are taken by the writer."""
        answers = await asyncio.gather(
            *(self.submit(r, IncomingSamples.none()) for r in rail_ids), return_exceptions=True
        )
        for rail_id, answer in zip(rail_ids, answers, strict=True):
            if isinstance(answer, NotFound) and self._tuning.waiting is not None:
                self._tuning.waiting.clear(rail_id)  # deleted: nothing left to judge
                if self._tuning.ahead is not None:
                    self._tuning.ahead.drop(rail_id)
            elif isinstance(answer, Exception):
                _log.error("judging the samples waiting on rail '%s' failed: %r", rail_id, answer)

    async def _drain(self) -> None:
        group: _Queued = []
        try:
            while self._queue:
                group = self._take()
                rails: dict[str, _Queued] = {}
                for entry in group:
                    rails.setdefault(entry[0], []).append(entry)
                work = [(rail_id, [b for _, b, _ in waiting]) for rail_id, waiting in rails.items()]
                outcomes: list[list[IngestResult | Exception]]
                try:
                    outcomes = await run_in_threadpool(
                        partial(ingest_rails, tuning=self._tuning), self._sessions, work
                    )
                except Exception as err:  # e.g. the database is unreachable: all of them hear
                    outcomes = [[err] * len(waiting) for waiting in rails.values()]
                for waiting, answers in zip(rails.values(), outcomes, strict=True):
                    for (_, _, done), outcome in zip(waiting, answers, strict=True):
                        if done.done():  # the client went away; its samples are stored anyway
                            continue
                        if isinstance(outcome, Exception):
                            done.set_exception(outcome)
                        else:
                            done.set_result(outcome)
                group = []
        finally:  # left early only when cancelled (shutdown): nobody may wait forever
            for _, _, done in [*group, *self._queue]:
                done.cancel()
            self._queue.clear()
            self._task = None

    def _take(self) -> _Queued:
        count, total = 0, 0
        for _, incoming, _ in self._queue:
            if count and total + incoming.n > self._max:
                break
            count, total = count + 1, total + incoming.n
        group, self._queue[:] = self._queue[:count], self._queue[count:]
        return group
