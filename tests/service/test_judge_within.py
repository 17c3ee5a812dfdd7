"""Routine samples judged later, in one pass with the rail's next ones (``judge_within_s``).

Waiting is batching: events and the live state are a pure function of the sample sequence,
so a rail whose samples wait and are judged together ends with the same events (each with
the time and seq of the sample that caused it) and the same live state as judging every
sample on arrival. The property below posts the invented traces one sample per request with
waiting allowed, the clock moving by random steps, the settling pass run at random points,
its passes run ahead at other random points (a pass run ahead serves only if nothing arrived
since), and the requests spread over two processes (each with its own memory, so the one that did
not hold the waiting samples reads them from the store), and compares with the reference.
"""

from __future__ import annotations

import asyncio
from dataclasses import replace
from typing import Any

import httpx
import numpy as np
import pytest
from fastapi import FastAPI
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from tests.conftest import MakeSettings
from tests.service.cuts import TRACES, Ingestor, incoming
from tests.service.test_cut_invariance import assert_same_state, new_rail, reference

from phaseward.api.app import SETTLE_EVERY_S, _settle_loop, close, create_app, settle_pause_s
from phaseward.api.group_commit import GroupCommit
from phaseward.monitor.conditions import Finding
from phaseward.monitor.ingest import (
    OVERDUE,
    IngestResult,
    Tuning,
    ingest,
    ingest_rails,
    judge_ahead,
)
from phaseward.monitor.resident import (
    SHORTEST_SHARE,
    STEADY_GAP,
    Ahead,
    LiveStates,
    Resident,
    Waiting,
)
from phaseward.monitor.telemetry import IncomingSamples, SampleBatch

pytestmark = pytest.mark.anyio

WITHIN_S = 5.0


class Clock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


def process(clock: Clock) -> Tuning:
    """One server process's monitor: its own memory, waiting allowed."""
    return Tuning(
        live=LiveStates(64), judge_within_s=WITHIN_S, waiting=Waiting(), monotonic=clock,
        ahead=Ahead(),
    )  # fmt: skip


def due(tuning: Tuning) -> list[str]:
    assert tuning.waiting is not None
    return tuning.waiting.due(tuning.monotonic(), tuning.judge_within_s)


def settle(rail: Ingestor, tuning: Tuning) -> None:
    """What the settling loop does for the rails that are due (here: the one rail), without
    running their passes ahead (the property runs them ahead at points of its own)."""
    work = [(r, [IncomingSamples.none()]) for r in due(tuning)]
    for outcomes in ingest_rails(rail.sessions, work, tuning=tuning):
        assert not any(isinstance(o, Exception) for o in outcomes), outcomes


def post(rail: Ingestor, k: int, tuning: Tuning) -> IngestResult:
    return ingest(
        rail.sessions, rail.rail_id, incoming(rail.trace.samples[k : k + 1]), tuning=tuning
    )


@st.composite
def schedules(draw: st.DrawFn) -> tuple[str, list[tuple[float, int, bool, bool]]]:
    """A trace, and per sample: the clock's step before it (s), the process it goes to (0/1),
    whether the passes of that process's due rails are run ahead after it, and whether its
    due rails are settled after it."""
    name = draw(st.sampled_from(sorted(TRACES)))
    n = len(TRACES[name].samples)
    steps = draw(st.lists(st.sampled_from([0.0, 0.5, 1.0, 1.0, 2.0, 7.0]), min_size=n, max_size=n))
    to = draw(st.lists(st.sampled_from([0, 0, 0, 0, 1]), min_size=n, max_size=n))
    ahead = draw(st.lists(st.booleans(), min_size=n, max_size=n))
    settles = draw(st.lists(st.booleans(), min_size=n, max_size=n))
    return name, list(zip(steps, to, ahead, settles, strict=True))


@settings(
    max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(case=schedules())
async def test_waiting_samples_leave_the_same_events_and_state(
    client: httpx.AsyncClient, app: FastAPI, case: tuple[str, list[tuple[float, int, bool, bool]]]
) -> None:
    name, schedule = case
    trace = TRACES[name]
    want_events, want_state = await reference(client, app, trace)
    rail = await new_rail(client, app, trace)
    clock = Clock()
    processes = [process(clock), process(clock)]
    for k, (step, to, ahead, settles) in enumerate(schedule):
        clock.now += step
        post(rail, k, processes[to])
        if ahead:
            judge_ahead(due(processes[to]), processes[to])
        if settles:
            settle(rail, processes[to])
    clock.now += WITHIN_S  # the last ones wait at most that long
    for tuning in processes:
        settle(rail, tuning)
    assert rail.events() == want_events
    assert_same_state(rail.live(), want_state)


@st.composite
def fleet_schedules(draw: st.DrawFn) -> tuple[list[str], list[tuple[float, list[int], int]]]:
    """Two or three rails (traces, repeats allowed), and per step: the clock's step (s), how
    many samples each rail posts in the step's one group (0 to 2: rails that post nothing
    stay out of it), and the process the group goes to (0/1)."""
    names = draw(st.lists(st.sampled_from(sorted(TRACES)), min_size=2, max_size=3))
    longest = max(len(TRACES[name].samples) for name in names)
    steps = []
    for _ in range(longest + 4):  # enough steps to post most of every trace
        counts = draw(st.lists(st.sampled_from([0, 1, 1, 1, 2]), min_size=len(names),
                               max_size=len(names)))  # fmt: skip
        step = draw(st.sampled_from([0.0, 1.0, 1.0, 2.0, 7.0]))
        steps.append((step, counts, draw(st.sampled_from([0, 0, 0, 1]))))
    return names, steps


@settings(
    max_examples=10, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(case=fleet_schedules())
async def test_rails_posting_in_shared_groups_end_as_judged_on_arrival(
    client: httpx.AsyncClient,
    app: FastAPI,
    case: tuple[list[str], list[tuple[float, list[int], int]]],
) -> None:
    """A fleet's group holds requests of several rails: the rails whose samples only wait
    share one insert and one restamp, the others are judged in savepoints of their own;
    every rail ends with the events and state of its trace judged on arrival."""
    names, schedule = case
    rails = [await new_rail(client, app, TRACES[name]) for name in names]
    clock = Clock()
    processes = [process(clock), process(clock)]
    sent = [0] * len(rails)
    for step, counts, to in schedule:
        clock.now += step
        work = []
        for r, (rail, count) in enumerate(zip(rails, counts, strict=True)):
            hi = min(sent[r] + count, len(rail.trace.samples))
            if hi > sent[r]:
                work.append((rail.rail_id, [incoming(rail.trace.samples[sent[r] : hi])]))
                sent[r] = hi
        for outcomes in ingest_rails(rails[0].sessions, work, tuning=processes[to]):
            assert not any(isinstance(o, Exception) for o in outcomes), outcomes
    for r, rail in enumerate(rails):  # the rest of each trace, one request each
        for k in range(sent[r], len(rail.trace.samples)):
            post(rail, k, processes[0])
    clock.now += WITHIN_S
    for tuning in processes:
        for rail in rails:
            settle(rail, tuning)
    for rail in rails:
        want_events, want_state = await reference(client, app, rail.trace)
        assert rail.events() == want_events
        assert_same_state(rail.live(), want_state)


async def test_routine_samples_wait_and_a_flag_is_judged_at_once(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    """The trip trace: phase 2's breaker flag at sample 30. Routine samples before it wait
    (no settling loop runs here: up to the backstop, ``OVERDUE`` windows), the flagged one is
    judged at once with those waiting, and its event carries its own time and seq."""
    trace = TRACES["trip"]
    rail = await new_rail(client, app, trace)
    clock = Clock()
    tuning = process(clock)
    counts = []
    for k in range(31):
        clock.now += 1.0
        counts.append(post(rail, k, tuning).waiting)
        if k == 29:  # nothing but the first sample's verdict so far
            assert [e[0] for e in rail.events()] == ["rail.condition"]
    assert counts[0] == 0  # the first sample of a rail is judged at once
    assert max(counts) >= OVERDUE * WITHIN_S  # routine samples waited, at one a second
    assert all(c <= OVERDUE * WITHIN_S + 1 for c in counts)  # and never longer
    assert counts[-1] == 0  # the flag: judged at once, with everything waiting
    isolated = [e for e in rail.events() if e[0] == "phase.isolated"]
    assert [(e[1], e[3], e[2]) for e in isolated] == [(2, 30, trace.samples[30]["time"])]


async def test_a_quiet_rail_is_judged_by_the_settling_loop(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    """A rail that stops posting: its waiting samples are judged once they are due, by the
    server's loop through the group commit (one writer), and nothing is left waiting."""
    trace = TRACES["trip"]
    rail = await new_rail(client, app, trace)
    clock = Clock()
    tuning = process(clock)
    for k in range(4):
        clock.now += 1.0
        post(rail, k, tuning)
    assert tuning.live is not None
    assert tuning.waiting is not None
    held = tuning.live.get(rail.rail_id)
    assert held is not None
    assert held.waiting is not None
    assert held.waiting.n == 3
    group = GroupCommit(rail.sessions, 1000, tuning=tuning)
    clock.now += WITHIN_S
    task = asyncio.create_task(_settle_loop(group, tuning))
    for _ in range(100):
        await asyncio.sleep(0.05)
        if not tuning.waiting.due(clock.now, 0.0):
            break
    task.cancel()
    assert not tuning.waiting.due(clock.now, 0.0)
    assert rail.live()["sample"]["seq"] == 3
    held = tuning.live.get(rail.rail_id)
    assert held is not None
    assert held.waiting is None


async def test_a_pass_run_ahead_serves_its_copy_and_what_waits_after_it_only(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    """The writer takes a pass run ahead for the copy it was run from, or for that copy grown
    by later, newer samples that wait (it judges the first parts, the rest go on waiting);
    never for another live state, other parts, or parts older than the ones it judged."""
    rail = await new_rail(client, app, TRACES["trip"])
    tuning = process(Clock())
    for k in range(3):
        post(rail, k, tuning)
    assert tuning.live is not None
    held = tuning.live.get(rail.rail_id)
    assert held is not None
    assert len(held.waiting_parts) == 2
    (t1, one), (t2, two) = held.waiting_parts
    passed: tuple[dict[str, Any], list[Finding]] = ({"judged": True}, [])
    newer = replace(two, t_s=two.t_s + 1.0, seq=two.seq + 1)

    def waiting(*parts: tuple[float, SampleBatch]) -> Resident:
        return replace(held, waiting_parts=parts)

    copies = {
        "the same copy": (held, (2, passed)),
        "grown by newer samples": (waiting(*held.waiting_parts, (t2, newer)), (2, passed)),
        "grown by an older sample": (waiting(*held.waiting_parts, (t2, one)), None),
        "another live state": (replace(held, state=dict(held.state)), None),
        "equal parts, not the same": (waiting((t1, one.take(slice(None))), (t2, two)), None),
        "fewer parts": (waiting(held.waiting_parts[0]), None),
    }
    ahead = Ahead()
    for what, (copy, want) in copies.items():
        ahead.put(rail.rail_id, held, passed)
        assert ahead.take(rail.rail_id, copy) == want, what
        assert ahead.take(rail.rail_id, held) is None, what  # taken once, whatever it served


@pytest.mark.parametrize("name", sorted(TRACES))
async def test_every_trace_waits_somewhere_and_ends_the_same(
    client: httpx.AsyncClient, app: FastAPI, name: str
) -> None:
    """The property is only as good as the waiting it sees: posted at one sample a second,
    every fifth request to another process, each trace has samples that wait, some read back
    from the store by the other process, and ends as the reference does."""
    trace = TRACES[name]
    want_events, want_state = await reference(client, app, trace)
    rail = await new_rail(client, app, trace)
    clock = Clock()
    processes = [process(clock), process(clock)]
    waited = 0
    for k in range(len(trace.samples)):
        clock.now += 1.0
        waited += post(rail, k, processes[int(k % 5 == 4)]).waiting > 0
    clock.now += WITHIN_S
    for tuning in processes:
        settle(rail, tuning)
    assert waited >= 5
    assert rail.events() == want_events
    assert_same_state(rail.live(), want_state)


async def test_samples_left_waiting_by_a_stop_are_judged_when_the_server_starts(
    make_settings: MakeSettings,
) -> None:
    """A server stops (killed: no shutdown) with routine samples waiting. The next server on
    the same database finds them at start (stored after their rail's live state) and judges
    them; a server shut down cleanly judges what waits before it stops."""
    trace = TRACES["trip"]
    settings = make_settings(judge_within_s=30.0)

    async def posted(app: FastAPI, rail_id: str, ks: range) -> list[int]:
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://t") as client:
            if ks.start == 0:
                created = await client.post("/v1/rails", json=trace.spec | {"id": rail_id})
                assert created.status_code == 201, created.text
            answers = [await client.post(f"/v1/rails/{rail_id}/samples", json=trace.samples[k])
                       for k in ks]  # fmt: skip
            assert all(a.status_code == 200 for a in answers)
            return [a.json()["waiting"] for a in answers]

    def judged_seq(app: FastAPI, rail_id: str) -> int:
        return int(Ingestor(app.state.sessions, rail_id, trace).live()["sample"]["seq"])

    killed = create_app(settings)
    assert (await posted(killed, "left", range(5)))[-1] == 4
    assert judged_seq(killed, "left") == 0
    close(killed)  # no shutdown: the waiting samples are stored, not judged

    clean = create_app(settings)
    async with clean.router.lifespan_context(clean):
        for _ in range(100):
            await asyncio.sleep(0.05)
            if judged_seq(clean, "left") == 4:
                break
        assert judged_seq(clean, "left") == 4
        assert await posted(clean, "right", range(4)) == [0, 1, 2, 3]
        assert judged_seq(clean, "right") == 0
    assert judged_seq(clean, "right") == 3  # judged on the way out
    close(clean)


async def test_with_waiting_off_the_settling_loop_judges_what_a_stop_left_and_does_not_spin(
    make_settings: MakeSettings, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Waiting turned off (``judge_within_s`` 0) after a stop left samples waiting: the next
    server still judges them at start, and its settling loop then looks a few times a second
    (a pause of 0 spun the event loop and took a core's share from every request)."""
    trace = TRACES["trip"]
    killed = create_app(make_settings(judge_within_s=30.0))
    transport = httpx.ASGITransport(app=killed)
    async with httpx.AsyncClient(transport=transport, base_url="http://t") as client:
        assert (await client.post("/v1/rails", json=trace.spec | {"id": "left"})).status_code == 201
        for k in range(4):
            assert (
                await client.post("/v1/rails/left/samples", json=trace.samples[k])
            ).status_code == 200
    close(killed)  # no shutdown: samples 1-3 stay waiting

    looks = 0
    look = Waiting.due

    def counted(self: Waiting, now: float, within_s: float) -> list[str]:
        nonlocal looks
        looks += 1
        return look(self, now, within_s)

    monkeypatch.setattr(Waiting, "due", counted)
    restarted = create_app(make_settings(judge_within_s=0.0))
    async with restarted.router.lifespan_context(restarted):
        await asyncio.sleep(0.5)
        seq = Ingestor(restarted.state.sessions, "left", trace).live()["sample"]["seq"]
    close(restarted)
    assert seq == 3
    assert 2 <= looks <= 10  # every 0.1 s; spinning made thousands
    assert settle_pause_s(0.0) == SETTLE_EVERY_S
    assert settle_pause_s(0.2) == pytest.approx(0.05)


async def test_a_rail_judged_elsewhere_is_no_longer_due_here(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    """Samples waiting in one process are judged by another (it reads them from the store);
    the first process's settling pass then finds nothing to judge and stops listing the
    rail, rather than trying it again forever."""
    trace = TRACES["trip"]
    rail = await new_rail(client, app, trace)
    clock = Clock()
    here, there = process(clock), process(clock)
    for k in range(4):
        clock.now += 1.0
        post(rail, k, here)
    assert here.waiting is not None
    assert here.waiting.due(clock.now, 0.0) == [rail.rail_id]
    clock.now += 1.0
    assert post(rail, 4, there).waiting == 0  # the first sample there: judged, with 1..3
    assert rail.live()["sample"]["seq"] == 4
    clock.now += WITHIN_S
    settle(rail, here)
    assert here.waiting.due(clock.now, 0.0) == []
    assert rail.live()["sample"]["seq"] == 4


def test_a_fleet_that_starts_together_falls_due_spread_then_runs_full_windows() -> None:
    """Rails whose first windows open in the same second fall due spread over the window
    (between SHORTEST_SHARE of it and all of it, fixed per rail), never later than the window;
    a window that opens soon after the rail's last one (a steady rail) runs full length, and
    the first window after a pause is spread again."""
    waiting = Waiting()
    rails = [f"rack-{k:03d}" for k in range(400)]
    for rail in rails:
        waiting.mark(rail, 100.0)
    assert waiting.due(100.0 + SHORTEST_SHARE * WITHIN_S - 1e-9, WITHIN_S) == []
    assert sorted(waiting.due(100.0 + WITHIN_S, WITHIN_S)) == sorted(rails)  # never late
    grid = np.linspace(0.0, 1.0, 201)

    def first_due(rail: str, opened: float) -> float:
        """The share of the window after which the rail is first due, to 1/200."""
        return min(k for k in grid if rail in waiting.due(opened + k * WITHIN_S, WITHIN_S))

    shares = np.array([first_due(rail, 100.0) for rail in rails[:50]])
    # evenly spread over [0.2, 1]: the quartiles within a tenth of uniform's
    assert np.quantile(shares, [0.25, 0.5, 0.75]) == pytest.approx([0.4, 0.6, 0.8], abs=0.1)
    first = rails[0]
    waiting.mark(first, 100.0)  # marked again by the next request of the same window
    assert first_due(first, 100.0) == shares[0]
    waiting.clear(first)
    waiting.mark(first, 106.0)  # the next window opens a second after the last was judged
    assert first_due(first, 106.0) == 1.0
    waiting.clear(first)
    waiting.mark(first, 106.0 + 10 * WITHIN_S)  # back after a pause: spread again
    assert first_due(first, 106.0 + 10 * WITHIN_S) == shares[0]


def test_rails_gone_quiet_are_forgotten_and_spread_again() -> None:
    """The settling loop's look forgets the window openings of rails that have not waited for
    STEADY_GAP windows (a fleet's rails come and go; deleted ones would otherwise be held for
    the life of the process); such a rail's next window is spread as a new rail's, as it would
    have been after that gap anyway, while a steady rail keeps its full window."""
    waiting = Waiting()
    gone = [f"bench-board-{k:04d}" for k in range(1000)]
    for rail in gone:
        waiting.mark(rail, 10.0)
        waiting.clear(rail)
    steady = "rack-steady"
    waiting.mark(steady, 10.0 + 2 * WITHIN_S)
    waiting.clear(steady)
    assert waiting.due(10.0 + STEADY_GAP * WITHIN_S + 1.0, WITHIN_S) == []
    assert waiting._opened.keys() == {steady}  # the only opening within STEADY_GAP windows
    later = 10.0 + STEADY_GAP * WITHIN_S + 2.0
    waiting.mark(steady, later)  # its window opens 2 s after the last: full length
    waiting.mark(gone[0], later)  # forgotten: spread like a rail never seen
    fresh = Waiting()
    fresh.mark(gone[0], later)
    for k in np.linspace(0.0, 1.0, 101):
        now = later + k * WITHIN_S
        assert (gone[0] in waiting.due(now, WITHIN_S)) == (gone[0] in fresh.due(now, WITHIN_S))
        assert (steady in waiting.due(now, WITHIN_S)) == (k >= 1.0)
