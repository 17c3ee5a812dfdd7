"""Live states held in memory, checkpoints instead of rewriting the covariance per sample.

Between checkpoints the state row is written without the estimator's covariance; a process
that holds the rail's state in memory (its stamp matching the row's) never reads the row back,
and one that does not (a restart, another process wrote) restores the covariance from the
checkpoint by replaying the samples judged since. The property: restarts and a second
process writing in between leave the same events and the same live state, covariance
included, as one uninterrupted process (to rounding).
"""

from __future__ import annotations

import math
from typing import Any

import httpx
import numpy as np
import pytest
from fastapi import FastAPI
from sqlalchemy import select
from tests.service.cuts import TRACES, Ingestor, Json, Trace, incoming
from tests.service.test_cut_invariance import assert_same_state

from phaseward.errors import Conflict
from phaseward.monitor.ingest import Tuning, ingest
from phaseward.monitor.resident import LiveStates
from phaseward.monitor.status import rail_status
from phaseward.store import samples, summaries
from phaseward.store.db import transaction
from phaseward.store.models import RailCheckpoint

pytestmark = pytest.mark.anyio

EVERY = 7  # samples between checkpoints: small, so the traces replay across several


def with_sense_voltages(trace: Trace) -> Trace:
    """The trace with phase 0's current sent as a DCR sense voltage every third sample (the
    one thing judged that a stored sample does not record)."""
    out = []
    for k, body in enumerate(trace.samples):
        body = {**body, "phases": [dict(p) for p in body["phases"]]}
        first = body["phases"][0]
        if k % 3 == 0 and first["index"] == 0 and first.get("temp_c") is not None:
            first["sense_v"] = round(first.pop("current_a") * 0.3e-3, 9)
        out.append(body)
    return Trace(trace.name + "-sense", trace.spec, out)


async def posted(
    client: httpx.AsyncClient, app: FastAPI, trace: Trace, tag: str, processes: list[Tuning]
) -> tuple[Ingestor, Json]:
    """Post the trace one sample per request, request k through ``processes[k % len]`` (each
    a process's tuning with its own memory); the events, stored state, and the whole state
    the last writer holds in memory."""
    rail_id = f"{trace.name}-{tag}"
    answer = await client.post("/v1/rails", json=trace.spec | {"id": rail_id})
    assert answer.status_code == 201, answer.text
    rail = Ingestor(app.state.sessions, rail_id, trace)
    for k, body in enumerate(trace.samples):
        tuning = processes[k % len(processes)]
        if tag == "restarts" and k % 11 == 10:  # the process restarts: its memory is empty
            assert tuning.live is not None
            tuning = processes[k % len(processes)] = Tuning(
                checkpoint_samples=EVERY, live=LiveStates(64)
            )
        ingest(app.state.sessions, rail_id, incoming([body]), tuning=tuning)
    last = processes[(len(trace.samples) - 1) % len(processes)].live
    assert last is not None
    held = last.get(rail_id)
    assert held is not None
    return rail, held.state


def same_floats(got: Any, want: Any) -> None:
    assert np.shape(got) == np.shape(want)
    for a, b in zip(np.ravel(got), np.ravel(want), strict=True):
        assert math.isclose(a, b, rel_tol=1e-7, abs_tol=1e-9), (a, b)


@pytest.mark.parametrize("name", ["trip", "collapse", "thermal"])
async def test_restarts_and_a_second_process_leave_the_same_events_and_state(
    client: httpx.AsyncClient, app: FastAPI, name: str
) -> None:
    trace = with_sense_voltages(TRACES[name])

    def process() -> Tuning:
        return Tuning(checkpoint_samples=EVERY, live=LiveStates(64))

    one, one_state = await posted(client, app, trace, "one", [process()])
    for tag, processes in (("restarts", [process()]), ("two", [process(), process()])):
        other, other_state = await posted(client, app, trace, tag, processes)
        assert other.events() == one.events()
        assert_same_state(other.live(), one.live())
        same_floats(other_state["estimate"]["cov_k2"], one_state["estimate"]["cov_k2"])
        same_floats(other_state["estimate"]["mean_c"], one_state["estimate"]["mean_c"])


async def test_the_covariance_is_written_at_checkpoints_only(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    trace = TRACES["trip"]
    answer = await client.post("/v1/rails", json=trace.spec | {"id": "ck"})
    assert answer.status_code == 201
    tuning = Tuning(checkpoint_samples=EVERY, live=LiveStates(64))
    rail = Ingestor(app.state.sessions, "ck", trace)
    checkpoints = []
    for body in trace.samples[:30]:
        ingest(app.state.sessions, "ck", incoming([body]), tuning=tuning)
        stored = rail.live()
        assert "cov_k2" not in stored["estimate"]
        assert "mean_c" in stored["estimate"]
        with transaction(app.state.sessions) as session:
            row = session.scalars(select(RailCheckpoint)).one()
            checkpoints.append(row.seq)
            assert "cov_k2" in row.state["estimate"]
    # The first sample starts the checkpoint; then one every EVERY judged samples.
    assert sorted(set(checkpoints)) == [0, *range(EVERY, 30, EVERY)]


async def test_status_from_memory_is_the_status_of_the_stored_state(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    """Status answers from the state this process holds when the row's stamp says it is the
    stored one, and from the store once another process has written since."""
    trace = TRACES["trip"]
    answer = await client.post("/v1/rails", json=trace.spec | {"id": "st"})
    assert answer.status_code == 201
    for body in trace.samples[:40]:
        assert (await client.post("/v1/rails/st/samples", json=body)).status_code == 200
    held = app.state.live_states.get("st")
    assert held is not None
    assert held.state["sample"]["seq"] == 39

    def both() -> tuple[dict[str, Any], dict[str, Any]]:
        with transaction(app.state.read_sessions) as session:
            memory = rail_status(session, "st", now_s=2e9, live_states=app.state.live_states)
            store = rail_status(session, "st", now_s=2e9)
        return memory, store

    memory, store = both()
    assert memory == store
    assert memory["last_sample"]["seq"] == 39
    # The view of a held state is built once per write; the sample's age follows the clock.
    with transaction(app.state.read_sessions) as session:
        later = rail_status(session, "st", now_s=2e9 + 30.0, live_states=app.state.live_states)
    assert later["last_sample"]["age_s"] == memory["last_sample"]["age_s"] + 30.0
    assert later | {"last_sample": None} == memory | {"last_sample": None}
    # Another process writes the next samples: this one's copy is stale, the row is not.
    other = Tuning(live=LiveStates(8))
    for body in trace.samples[40:45]:
        ingest(app.state.sessions, "st", incoming([body]), tuning=other)
    memory, store = both()
    assert memory == store
    assert memory["last_sample"]["seq"] == 44
    assert (await client.get("/v1/rails/st/status")).json()["last_sample"]["seq"] == 44


async def test_a_restart_after_retention_removed_the_replayed_samples_still_ingests(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    """A rail idle past the raw-sample horizon: retention deleted the samples judged since its
    checkpoint. The next sample after a restart resumes from the checkpoint's covariance."""
    trace = TRACES["trip"]
    answer = await client.post("/v1/rails", json=trace.spec | {"id": "idle"})
    assert answer.status_code == 201
    before = Tuning(checkpoint_samples=EVERY, live=LiveStates(8))
    for body in trace.samples[:10]:
        ingest(app.state.sessions, "idle", incoming([body]), tuning=before)
    with transaction(app.state.sessions) as session:
        gone = summaries.delete_samples_before(session, "idle", end_s=trace.samples[9]["time"] + 1)
    assert gone == 10
    after = Tuning(checkpoint_samples=EVERY, live=LiveStates(8))
    result = ingest(app.state.sessions, "idle", incoming([trace.samples[10]]), tuning=after)
    assert result.stored == 1
    held = after.live.get("idle") if after.live is not None else None
    assert held is not None
    assert held.state["sample"]["seq"] == 10


async def test_a_late_sample_another_process_stored_is_still_a_resend_here(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    """A process skips the resend look-up for seqs above the highest it knows stored. A late
    sample (older than the live state, so judged by nobody) stored by another process must
    void that knowledge: its resend here is a duplicate, stored once, and other content under
    its seq is a conflict."""
    trace = TRACES["trip"]
    answer = await client.post("/v1/rails", json=trace.spec | {"id": "late"})
    assert answer.status_code == 201
    here, there = (Tuning(live=LiveStates(8)) for _ in range(2))
    for body in trace.samples[:10]:
        ingest(app.state.sessions, "late", incoming([body]), tuning=here)
    late = trace.samples[3] | {"seq": 100, "time": trace.samples[3]["time"] + 0.5}
    first = ingest(app.state.sessions, "late", incoming([late]), tuning=there)
    assert (first.stored, first.late) == (1, 1)
    again = ingest(app.state.sessions, "late", incoming([late]), tuning=here)
    assert (again.stored, again.duplicates) == (0, 1)
    with pytest.raises(Conflict):
        ingest(app.state.sessions, "late", incoming([late | {"vin_v": 11.0}]), tuning=here)
    # The process that stored it knows too, and the next samples still go through both.
    assert ingest(app.state.sessions, "late", incoming([late]), tuning=there).duplicates == 1
    nxt = ingest(app.state.sessions, "late", incoming([trace.samples[10]]), tuning=here)
    assert nxt.stored == 1
    with transaction(app.state.sessions) as session:
        assert samples.count(session, "late") == 12
        assert samples.highest_seq(session, "late") == 100
