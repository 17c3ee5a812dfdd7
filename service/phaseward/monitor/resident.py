"""Live states kept in memory between requests, so the hot path writes the state row but does
not read it back.

A process holds, per recently active rail, the whole live state after its last write (the
estimator's covariance included, which the row leaves out), the rail model it was computed
with and the row's stamp: a random token each write stores. Ingest reads the row's stamp
under the rail's lock; if it is this copy's, nobody else wrote since and the copy is the state
as stored. Otherwise (another process wrote, a restart, a new definition) the state is read
from the row and its covariance restored from the checkpoint (``monitor.ingest``). Copies are
published only after their transaction commits, so readers see committed states only.
"""

from __future__ import annotations

import math
import threading
import zlib
from collections import OrderedDict
from dataclasses import dataclass
from functools import cached_property
from typing import Any

from phaseward.monitor.conditions import Passed
from phaseward.monitor.rail_model import RailModel
from phaseward.monitor.telemetry import SampleBatch, in_time_order

WaitingPart = tuple[float, SampleBatch]  # samples that arrived together, and when (monotonic s)


@dataclass(frozen=True)
class Resident:
    """A rail's live state as its last write stored it.

    A stamp is held by the one process that wrote it (stamps are random, and a copy is only
    made by writing). So a process whose copy has the row's stamp may store samples without
    writing the row: no copy elsewhere can vouch for the rail's stored seqs or its waiting
    samples, and its own copy, updated, stays current. A pass that stores samples without
    such a copy writes a new stamp, which voids any copy held elsewhere.

    ``replay``: what was judged since the checkpoint (the row's column of the same name);
    ``seq_ceiling``: the highest seq of the rail stored, so a batch of higher seqs needs no
    resend look-up; ``waiting_parts``: routine samples stored and left to be judged with the
    rail's next ones (setting ``judge_within_s``), each arrival's in time order with when it
    arrived (monotonic s), joined only when judged (:attr:`waiting`); ``state`` and ``spec``
    are never changed in place."""

    stamp: int
    version: int
    spec: dict[str, Any]  # the definition of ``version``, as stored
    model: RailModel
    state: dict[str, Any]
    replay: list[Any]
    seq_ceiling: int
    waiting_parts: tuple[WaitingPart, ...] = ()  # stored, newer than ``state``, not judged

    @property
    def waiting_since(self) -> float | None:
        """When the first of the waiting samples arrived (monotonic s)."""
        return self.waiting_parts[0][0] if self.waiting_parts else None

    @property
    def waiting_n(self) -> int:
        return sum(part.n for _, part in self.waiting_parts)

    @cached_property
    def waiting(self) -> SampleBatch | None:
        """The waiting samples as one batch in time order (stable: arrival order among equal
        times, as if each arrival had been merged in as it came)."""
        parts = [part for _, part in self.waiting_parts]
        return in_time_order(*parts) if parts else None


class LiveStates:
    """The residents of up to ``size`` rails, least recently used dropped first."""

    def __init__(self, size: int) -> None:
        self._size = size
        self._held: OrderedDict[str, Resident] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, rail_id: str) -> Resident | None:
        with self._lock:
            found = self._held.get(rail_id)
            if found is not None:
                self._held.move_to_end(rail_id)
            return found

    def put(self, rail_id: str, resident: Resident) -> None:
        with self._lock:
            self._held[rail_id] = resident
            self._held.move_to_end(rail_id)
            while len(self._held) > self._size:
                self._held.popitem(last=False)

    def drop(self, rail_id: str) -> None:
        with self._lock:
            self._held.pop(rail_id, None)


# A window that opens within this many windows of the rail's previous one is a steady rail's
# (its samples keep coming, each window opening as the last is judged): it runs full length.
STEADY_GAP = 2.0
SHORTEST_SHARE = 0.2  # of the window, for a rail's first window after a gap (see Waiting)


class Waiting:
    """The rails with samples stored and not yet judged, and since when (monotonic s): what
    the settling loop judges once they have waited ``judge_within_s``.

    A rail's first window after a gap (a start, a restart, a rack back from a pause) is
    shortened to a share of the window fixed per rail, between ``SHORTEST_SHARE`` and 1: a
    fleet that starts together would otherwise fall due in the same second, and its first
    passes, the heaviest (every model sent, every rail assessed), would run past the backstop.
    Spread this way the rails' windows stay spread, since each opens as the last is judged.
    Judging earlier is always allowed (the bound is an upper one); only these first windows
    are shortened, so the steady rate of passes is unchanged."""

    def __init__(self) -> None:
        # Per waiting rail: since, and the gap between its window's opening and the last's.
        self._since: dict[str, tuple[float, float]] = {}
        self._opened: dict[str, float] = {}  # when each rail's last window opened (_forget)
        self._forget_at = -math.inf  # when ``due`` next forgets windows opened long ago
        self._lock = threading.Lock()

    def mark(self, rail_id: str, since: float) -> None:
        with self._lock:
            if self._since.get(rail_id, (None,))[0] != since:  # a window opens
                gap = since - self._opened.get(rail_id, -math.inf)
                self._opened[rail_id] = since
                self._since[rail_id] = (since, gap)

    def __contains__(self, rail_id: object) -> bool:
        with self._lock:
            return rail_id in self._since

    def clear(self, rail_id: str) -> None:
        with self._lock:
            self._since.pop(rail_id, None)

    def due(self, now: float, within_s: float) -> list[str]:
        """The rails whose first waiting sample arrived ``within_s`` (times the rail's share,
        for a first window after a gap of ``STEADY_GAP`` windows or more) or more before
        ``now``."""
        with self._lock:
            if within_s > 0 and math.isfinite(now) and now >= self._forget_at:
                self._forget(now - STEADY_GAP * within_s)
                self._forget_at = now + STEADY_GAP * within_s
            return [
                r
                for r, (since, gap) in self._since.items()
                if now - since >= within_s * _share(r, gap, within_s)
            ]

    def _forget(self, before: float) -> None:
        """Drop the openings of rails not waiting whose last window opened before ``before``:
        the next window of such a rail opens after a gap of ``STEADY_GAP`` windows or more
        either way, so it is spread as a rail never seen is (a sample that arrived just before
        and is marked just after may fall due earlier than otherwise: never later), and a
        rail deleted or gone quiet is not remembered for the life of the process."""
        self._opened = {r: t for r, t in self._opened.items() if t >= before or r in self._since}


def _share(rail_id: str, gap: float, within_s: float) -> float:
    """A steady rail's window runs full length; one after a gap, a share fixed by the rail's
    name, spread evenly over the rails."""
    if not gap >= STEADY_GAP * within_s:  # NaN included: a window marked at -inf (a stop's)
        return 1.0
    spread = zlib.crc32(rail_id.encode()) / 2**32
    return SHORTEST_SHARE + (1.0 - SHORTEST_SHARE) * spread


class Ahead:
    """Passes over rails' waiting samples run ahead of the write that stores their outcome: the
    settling loop runs them outside the writer (``ingest.judge_ahead``), so the groups of
    requests go on committing meanwhile. A pass serves the copy it was run from, and a copy
    that grew from it by samples that only wait: the writer takes it if the rail's live state
    is still that very object (nobody wrote since) and the waiting parts it judged are the
    first of the copy's (the same objects), every later one newer than all of them (so
    judging them later keeps time order). Otherwise the writer runs the pass itself."""

    def __init__(self) -> None:
        self._passes: dict[str, tuple[Resident, Passed]] = {}
        self._lock = threading.Lock()

    def put(self, rail_id: str, basis: Resident, passed: Passed) -> None:
        with self._lock:
            self._passes[rail_id] = (basis, passed)

    def drop(self, rail_id: str) -> None:
        with self._lock:
            self._passes.pop(rail_id, None)

    def take(self, rail_id: str, held: Resident) -> tuple[int, Passed] | None:
        """How many of ``held``'s waiting parts the pass judged, and what it found; None if
        there is no pass for ``held``."""
        with self._lock:
            found = self._passes.pop(rail_id, None)
        if found is None:
            return None
        basis, passed = found
        judged = basis.waiting_parts
        if held.state is not basis.state or len(held.waiting_parts) < len(judged):
            return None
        if any(a is not b for a, b in zip(judged, held.waiting_parts, strict=False)):
            return None
        later = held.waiting_parts[len(judged) :]
        if later and min(p.t_s.min() for _, p in later) <= max(p.t_s.max() for _, p in judged):
            return None
        return len(judged), passed
