"""Group commit: concurrent ingest requests for one rail share one transaction.

While one group is being stored, the requests that arrive queue up; when it commits, all of
them go as the next group: one monitor pass and one durable commit for many requests. With
no concurrency a request is its own group and waits for nothing. Every request is answered
only after the commit that stored its samples, and keeps its own all-or-nothing outcome.
"""

from __future__ import annotations

import asyncio

from fastapi.concurrency import run_in_threadpool
from sqlalchemy.orm import Session, sessionmaker

from phaseward.monitor.ingest import IngestResult, ingest_together
from phaseward.monitor.telemetry import IncomingSamples

_Waiting = list[tuple[IncomingSamples, "asyncio.Future[IngestResult]"]]


class GroupCommit:
    """Per rail, at most one group in flight and one forming; a group holds at most
    ``max_samples`` samples (a larger single request still goes alone)."""

    def __init__(self, sessions: sessionmaker[Session], max_samples: int) -> None:
        self._sessions = sessions
        self._max = max_samples
        self._queues: dict[str, _Waiting] = {}
        self._tasks: set[asyncio.Task[None]] = set()

    async def submit(self, rail_id: str, incoming: IncomingSamples) -> IngestResult:
        done: asyncio.Future[IngestResult] = asyncio.get_running_loop().create_future()
        queue = self._queues.get(rail_id)
        if queue is None:  # nothing in flight for this rail: this request starts a drain
            queue = self._queues[rail_id] = []
            task = asyncio.create_task(self._drain(rail_id, queue))
            self._tasks.add(task)  # held until done: the loop keeps only weak references
            task.add_done_callback(self._tasks.discard)
        queue.append((incoming, done))
        return await done

    async def _drain(self, rail_id: str, queue: _Waiting) -> None:
        group: _Waiting = []
        try:
            while queue:
                group = self._take(queue)
                outcomes: list[IngestResult | Exception]
                try:
                    outcomes = list(
                        await run_in_threadpool(
                            ingest_together, self._sessions, rail_id, [b for b, _ in group]
                        )
                    )
                except Exception as err:  # e.g. the database is unreachable: all of them hear
                    outcomes = [err] * len(group)
                for (_, done), outcome in zip(group, outcomes, strict=True):
                    if done.done():  # the client went away; its samples are stored anyway
                        continue
                    if isinstance(outcome, Exception):
                        done.set_exception(outcome)
                    else:
                        done.set_result(outcome)
                group = []
        finally:  # left early only when cancelled (shutdown): nobody may wait forever
            for _, done in [*group, *queue]:
                done.cancel()
            del self._queues[rail_id]

    def _take(self, queue: _Waiting) -> _Waiting:
        count, total = 0, 0
        for incoming, _ in queue:
            if count and total + incoming.n > self._max:
                break
            count, total = count + 1, total + incoming.n
        group, queue[:] = queue[:count], queue[count:]
        return group
