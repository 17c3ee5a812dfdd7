"""Batching senders: buffer samples, post them in batches, retry what can be retried.

Policy, the same for ``BatchingSender`` (a background thread) and ``AsyncBatchingSender`` (an
asyncio task):

* A batch is posted as one columnar body (``columns.to_columns``), which the service checks
  as arrays; a batch that does not fit columns is posted as objects.
* A batch is posted when ``batch_size`` samples are waiting, when the oldest waiting sample
  has waited ``max_delay_s``, on ``flush()``, and on ``close()`` / leaving the ``with`` block.
* A sample without ``seq`` gets the next number of the sender's counter. The counter starts
  at ``first_seq``, by default the microseconds since the epoch when the sender was made, so a
  restarted rack does not reuse numbers; a sample that brings its own ``seq`` moves the counter
  past it.
* 429 and 503 (and 502, 504) answers and transport errors (refused connection, timeout, reset)
  are retried with exponential backoff and full jitter; a Retry-After header is honoured.
  This is safe: the service absorbs a resent (rail, seq) with the same content as a duplicate.
  Any other refusal (a 4xx such as 422 for a bad value, 404 for an unknown rail, 409 for a seq
  reused with other content) is not retried: the batch is set aside as ``SendFailed`` and
  raised by the next ``add()``, ``flush()`` or ``close()``; later batches are still sent.
  When the retries run out, the batch is set aside the same way. ``failures`` lists them all.
* The buffer is bounded (``max_buffer`` waiting samples). When it is full, ``add()`` BLOCKS
  until the sender has made room, for at most ``full_timeout_s`` seconds, and then raises
  ``BufferFull`` (``full_timeout_s=0`` raises at once, ``None`` waits as long as it takes).
  Blocking is the default because it slows a fast producer down to what the service takes
  instead of losing samples.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import dataclasses
import random
import threading
import time
from dataclasses import dataclass, field
from types import TracebackType
from typing import Any, Self

import httpx

from phaseward_client.aio import AsyncClient
from phaseward_client.client import Client
from phaseward_client.errors import BufferFull, PhasewardError, SendFailed
from phaseward_client.inputs import Sample, SampleLike, sample_json
from phaseward_client.models import IngestResult

JsonObject = dict[str, Any]
MAX_SEQ = 2**62


@dataclass(frozen=True)
class RetryPolicy:
    """How a sender retries. Attempt ``n`` (0 for the first retry) waits a uniformly random
    time in ``[0, min(max_delay_s, base_delay_s * 2**n)]``, or the Retry-After time (at most
    ``max_retry_after_s``) plus up to ``base_delay_s`` when the service sent one."""

    max_attempts: int = 8
    base_delay_s: float = 0.2
    max_delay_s: float = 10.0
    max_retry_after_s: float = 120.0
    statuses: frozenset[int] = frozenset({429, 502, 503, 504})

    def retryable(self, error: Exception) -> bool:
        if isinstance(error, PhasewardError):
            return error.status in self.statuses
        return isinstance(error, httpx.TransportError)

    def delay_s(self, retry: int, error: Exception, rng: random.Random) -> float:
        if isinstance(error, PhasewardError) and error.retry_after_s is not None:
            return min(error.retry_after_s, self.max_retry_after_s) + rng.uniform(
                0.0, self.base_delay_s
            )
        return rng.uniform(0.0, min(self.max_delay_s, self.base_delay_s * 2.0**retry))


@dataclass
class SenderStats:
    """Counters of a sender (read them after ``flush()``)."""

    added: int = 0
    batches: int = 0
    stored: int = 0
    duplicates: int = 0
    retries: int = 0
    failed: int = 0
    last_result: IngestResult | None = None
    retry_delays_s: list[float] = field(default_factory=list)


class _Sequencer:
    def __init__(self, first_seq: int | None) -> None:
        self.next = time.time_ns() // 1000 if first_seq is None else first_seq
        if not 0 <= self.next <= MAX_SEQ:
            raise ValueError(f"first_seq must be within 0..2**62, not {self.next}")

    def stamp(self, sample: SampleLike) -> JsonObject:
        """The sample as JSON with a seq (validated now, so a bad sample fails in add())."""
        if isinstance(sample, Sample):
            given = sample.seq
            if given is None:
                body = dataclasses.replace(sample, seq=self.next).to_json()
            else:
                body = sample.to_json()
        else:
            body = sample_json(sample)
            raw = body.get("seq")
            given = raw if isinstance(raw, int) and not isinstance(raw, bool) else None
            if raw is None:
                body["seq"] = self.next
            elif given is None:
                raise TypeError(f"seq must be an integer, not {raw!r}")
        if given is None:
            self.next += 1
        else:
            self.next = max(self.next, given + 1)
        return body


def _check_sizes(batch_size: int, max_buffer: int, max_delay_s: float) -> None:
    if batch_size < 1:
        raise ValueError("batch_size must be at least 1")
    if max_buffer < batch_size:
        raise ValueError("max_buffer must be at least batch_size")
    if not max_delay_s > 0:
        raise ValueError("max_delay_s must be positive")


class BatchingSender:
    """Streams samples of one rail to the service from a background thread (see the module
    docstring for the policy). Use as a context manager, or call ``close()``."""

    def __init__(
        self,
        client: Client,
        rail_id: str,
        *,
        batch_size: int = 200,
        max_delay_s: float = 1.0,
        max_buffer: int = 10_000,
        full_timeout_s: float | None = 30.0,
        first_seq: int | None = None,
        retry: RetryPolicy | None = None,
        seed: int | None = None,
    ) -> None:
        _check_sizes(batch_size, max_buffer, max_delay_s)
        self.client = client
        self.rail_id = rail_id
        self.batch_size = batch_size
        self.max_delay_s = max_delay_s
        self.max_buffer = max_buffer
        self.full_timeout_s = full_timeout_s
        self.retry = retry or RetryPolicy()
        self.stats = SenderStats()
        self.failures: list[SendFailed] = []
        self._rng = random.Random(seed)
        self._seq = _Sequencer(first_seq)
        self._pending: collections.deque[tuple[float, JsonObject]] = collections.deque()
        self._unraised: collections.deque[SendFailed] = collections.deque()
        self._cond = threading.Condition()
        self._taken = 0  # samples moved from the buffer into a batch
        self._done = 0  # samples whose batch was stored or given up
        self._flush_through = 0
        self._closing = False
        self._crash: BaseException | None = None
        self._thread = threading.Thread(
            target=self._work, name=f"phaseward-sender-{rail_id}", daemon=True
        )
        self._thread.start()

    # --- the caller's side ---------------------------------------------------------------

    def add(self, sample: SampleLike) -> int:
        """Queue one sample; returns the seq it is sent with. Blocks while the buffer is full
        (see ``full_timeout_s``); raises a pending ``SendFailed`` first."""
        body = None
        with self._cond:
            self._raise_pending()
            if self._closing:
                raise RuntimeError("the sender is closed")
            deadline = (
                None if self.full_timeout_s is None else time.monotonic() + self.full_timeout_s
            )
            while len(self._pending) >= self.max_buffer:
                left = None if deadline is None else deadline - time.monotonic()
                if left is not None and left <= 0:
                    raise BufferFull(
                        f"{len(self._pending)} samples wait for rail '{self.rail_id}' "
                        f"(max_buffer {self.max_buffer}) for more than {self.full_timeout_s} s"
                    )
                self._cond.wait(left)
                self._raise_pending()
            body = self._seq.stamp(sample)
            self._pending.append((time.monotonic(), body))
            self.stats.added += 1
            if len(self._pending) >= self.batch_size:
                self._cond.notify_all()
            elif len(self._pending) == 1:
                self._cond.notify_all()  # the worker starts the max_delay_s clock
        seq: int = body["seq"]
        return seq

    def add_many(self, samples: list[SampleLike]) -> list[int]:
        return [self.add(s) for s in samples]

    def flush(self, timeout_s: float | None = None) -> None:
        """Send everything added so far and wait until it is stored or set aside; raises the
        first ``SendFailed`` not raised yet."""
        with self._cond:
            target = self._taken + len(self._pending)
            self._flush_through = max(self._flush_through, target)
            self._cond.notify_all()
            ok = self._cond.wait_for(
                lambda: self._done >= target or self._crash is not None, timeout_s
            )
            self._raise_pending()
            if not ok:
                raise TimeoutError(f"flush did not finish within {timeout_s} s")

    def close(self, timeout_s: float | None = None) -> None:
        """Flush, stop the thread, raise the first ``SendFailed`` not raised yet. Idempotent."""
        with self._cond:
            self._closing = True
            self._flush_through = self._taken + len(self._pending)
            self._cond.notify_all()
        self._thread.join(timeout_s)
        if self._thread.is_alive():
            raise TimeoutError(f"the sender did not finish within {timeout_s} s")
        with self._cond:
            self._raise_pending()

    @property
    def pending(self) -> int:
        """Samples added but not yet stored or set aside."""
        with self._cond:
            return self.stats.added - self._done

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if exc_type is None:
            self.close()
            return
        # The body's exception wins; the failures stay listed in self.failures.
        with contextlib.suppress(SendFailed, TimeoutError):
            self.close()

    def _raise_pending(self) -> None:
        if self._crash is not None:
            raise RuntimeError("the sender's thread died") from self._crash
        if self._unraised:
            raise self._unraised.popleft()

    # --- the thread ----------------------------------------------------------------------

    def _due(self) -> bool:
        return (
            len(self._pending) >= self.batch_size
            or self._closing
            or self._flush_through > self._taken
            or time.monotonic() - self._pending[0][0] >= self.max_delay_s
        )

    def _work(self) -> None:
        try:
            while True:
                with self._cond:
                    while not self._pending or not self._due():
                        if not self._pending:
                            if self._closing:
                                return
                            self._cond.wait()
                        else:
                            left = self._pending[0][0] + self.max_delay_s - time.monotonic()
                            self._cond.wait(max(left, 0.0))
                    count = min(self.batch_size, len(self._pending))
                    batch = [self._pending.popleft()[1] for _ in range(count)]
                    self._taken += count
                    self._cond.notify_all()  # room in the buffer
                failure = self._send(batch)
                with self._cond:
                    self._done += len(batch)
                    if failure is not None:
                        self.failures.append(failure)
                        self._unraised.append(failure)
                        self.stats.failed += len(batch)
                    self._cond.notify_all()
        except BaseException as err:  # pragma: no cover - a bug; surfaced to the caller
            with self._cond:
                self._crash = err
                self._cond.notify_all()
            raise

    def _send(self, batch: list[JsonObject]) -> SendFailed | None:
        retry = 0
        while True:
            try:
                result = self.client.post_columns(self.rail_id, batch)
            except (PhasewardError, httpx.TransportError) as err:
                if not self.retry.retryable(err) or retry + 1 >= self.retry.max_attempts:
                    return SendFailed(self.rail_id, batch, err)
                delay = self.retry.delay_s(retry, err, self._rng)
                with self._cond:
                    self.stats.retries += 1
                    self.stats.retry_delays_s.append(delay)
                time.sleep(delay)
                retry += 1
                continue
            with self._cond:
                self.stats.batches += 1
                self.stats.stored += result.stored
                self.stats.duplicates += result.duplicates
                self.stats.last_result = result
            return None


class AsyncBatchingSender:
    """The asyncio twin of ``BatchingSender``: ``await add()``, ``await flush()``,
    ``await aclose()`` or ``async with``. The sending task starts with the first ``add()``."""

    def __init__(
        self,
        client: AsyncClient,
        rail_id: str,
        *,
        batch_size: int = 200,
        max_delay_s: float = 1.0,
        max_buffer: int = 10_000,
        full_timeout_s: float | None = 30.0,
        first_seq: int | None = None,
        retry: RetryPolicy | None = None,
        seed: int | None = None,
    ) -> None:
        _check_sizes(batch_size, max_buffer, max_delay_s)
        self.client = client
        self.rail_id = rail_id
        self.batch_size = batch_size
        self.max_delay_s = max_delay_s
        self.max_buffer = max_buffer
        self.full_timeout_s = full_timeout_s
        self.retry = retry or RetryPolicy()
        self.stats = SenderStats()
        self.failures: list[SendFailed] = []
        self._rng = random.Random(seed)
        self._seq = _Sequencer(first_seq)
        self._pending: collections.deque[tuple[float, JsonObject]] = collections.deque()
        self._unraised: collections.deque[SendFailed] = collections.deque()
        self._taken = 0
        self._done = 0
        self._flush_through = 0
        self._closing = False
        self._task: asyncio.Task[None] | None = None
        self._wake: asyncio.Event | None = None
        self._progress: asyncio.Event | None = None

    def _events(self) -> tuple[asyncio.Event, asyncio.Event]:
        if self._wake is None or self._progress is None:
            self._wake, self._progress = asyncio.Event(), asyncio.Event()
        return self._wake, self._progress

    def _start(self) -> None:
        if self._task is None:
            self._events()
            self._task = asyncio.get_running_loop().create_task(
                self._work(), name=f"phaseward-sender-{self.rail_id}"
            )

    async def _await_progress(self, timeout_s: float | None) -> None:
        """Wait until the task finishes a batch (or dies)."""
        _, progress = self._events()
        if self._task is not None and self._task.done():
            return
        if timeout_s is None:
            await progress.wait()
        else:
            await asyncio.wait_for(progress.wait(), timeout_s)

    def _raise_pending(self) -> None:
        if self._task is not None and self._task.done():
            crash = None if self._task.cancelled() else self._task.exception()
            if crash is not None:
                raise RuntimeError("the sender's task died") from crash
            if not self._closing:
                raise RuntimeError("the sender's task was cancelled")
        if self._unraised:
            raise self._unraised.popleft()

    async def add(self, sample: SampleLike) -> int:
        """Queue one sample; returns its seq. Waits while the buffer is full (see
        ``full_timeout_s``); raises a pending ``SendFailed`` first."""
        self._raise_pending()
        if self._closing:
            raise RuntimeError("the sender is closed")
        self._start()
        loop = asyncio.get_running_loop()
        deadline = None if self.full_timeout_s is None else loop.time() + self.full_timeout_s
        while len(self._pending) >= self.max_buffer:
            left = None if deadline is None else deadline - loop.time()
            if left is not None and left <= 0:
                raise BufferFull(
                    f"{len(self._pending)} samples wait for rail '{self.rail_id}' "
                    f"(max_buffer {self.max_buffer}) for more than {self.full_timeout_s} s"
                )
            try:
                await self._await_progress(left)
            except TimeoutError:
                continue
            self._raise_pending()
        body = self._seq.stamp(sample)
        self._pending.append((loop.time(), body))
        self.stats.added += 1
        wake, _ = self._events()
        wake.set()
        seq: int = body["seq"]
        return seq

    async def flush(self, timeout_s: float | None = None) -> None:
        """Send everything added so far and wait until it is stored or set aside."""
        target = self._taken + len(self._pending)
        self._flush_through = max(self._flush_through, target)
        if self._task is not None:
            wake, _ = self._events()
            wake.set()
            loop = asyncio.get_running_loop()
            deadline = None if timeout_s is None else loop.time() + timeout_s
            while self._done < target and not self._task.done():
                left = None if deadline is None else deadline - loop.time()
                if left is not None and left <= 0:
                    raise TimeoutError(f"flush did not finish within {timeout_s} s")
                try:
                    await self._await_progress(left)
                except TimeoutError:
                    continue
        self._raise_pending()

    async def aclose(self) -> None:
        """Flush, stop the task, raise the first ``SendFailed`` not raised yet. Idempotent."""
        self._closing = True
        self._flush_through = self._taken + len(self._pending)
        if self._task is not None:
            wake, _ = self._events()
            wake.set()
            await asyncio.wait([self._task])
        self._raise_pending()

    @property
    def pending(self) -> int:
        return self.stats.added - self._done

    async def __aenter__(self) -> Self:
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if exc_type is None:
            await self.aclose()
            return
        with contextlib.suppress(SendFailed):
            await self.aclose()

    def _due(self, now: float) -> bool:
        return (
            len(self._pending) >= self.batch_size
            or self._closing
            or self._flush_through > self._taken
            or now - self._pending[0][0] >= self.max_delay_s
        )

    async def _work(self) -> None:
        wake, _ = self._events()
        loop = asyncio.get_running_loop()
        try:
            while True:
                if not self._pending:
                    if self._closing:
                        return
                    wake.clear()
                    await wake.wait()
                    continue
                now = loop.time()
                if not self._due(now):
                    wake.clear()
                    left = self._pending[0][0] + self.max_delay_s - now
                    with contextlib.suppress(TimeoutError):
                        await asyncio.wait_for(wake.wait(), left)
                    continue
                count = min(self.batch_size, len(self._pending))
                batch = [self._pending.popleft()[1] for _ in range(count)]
                self._taken += count
                failure = await self._send(batch)
                self._done += len(batch)
                if failure is not None:
                    self.failures.append(failure)
                    self._unraised.append(failure)
                    self.stats.failed += len(batch)
                self._signal_progress()
        finally:
            self._signal_progress()

    def _signal_progress(self) -> None:
        _, progress = self._events()
        progress.set()
        self._progress = asyncio.Event()

    async def _send(self, batch: list[JsonObject]) -> SendFailed | None:
        retry = 0
        while True:
            try:
                result = await self.client.post_columns(self.rail_id, batch)
            except (PhasewardError, httpx.TransportError) as err:
                if not self.retry.retryable(err) or retry + 1 >= self.retry.max_attempts:
                    return SendFailed(self.rail_id, batch, err)
                delay = self.retry.delay_s(retry, err, self._rng)
                self.stats.retries += 1
                self.stats.retry_delays_s.append(delay)
                await asyncio.sleep(delay)
                retry += 1
                continue
            self.stats.batches += 1
            self.stats.stored += result.stored
            self.stats.duplicates += result.duplicates
            self.stats.last_result = result
            return None
