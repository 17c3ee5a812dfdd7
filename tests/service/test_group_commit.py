"""Group commit: concurrent ingest requests share one transaction (across rails), the requests
of one rail one monitor pass, yet each keeps its own all-or-nothing outcome and its own
answer."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import anyio
import httpx
import numpy as np
import pytest
from fastapi import FastAPI
from tests.factories import rail_spec, sample

from phaseward.api.app import close, create_app
from phaseward.api.group_commit import GroupCommit
from phaseward.api.schemas.samples import SAMPLES, to_incoming
from phaseward.errors import Conflict, PhasewardError
from phaseward.monitor import ingest as ingest_module
from phaseward.monitor import rejections
from phaseward.monitor.ingest import IngestResult, ingest, ingest_together
from phaseward.monitor.telemetry import IncomingSamples
from phaseward.store import events
from phaseward.store import state as state_store
from phaseward.store.db import transaction

pytestmark = pytest.mark.anyio

HEALTHY = [20.0, 20.0, 20.0, 20.0]
TRIPPED = [26.7, 0.0, 26.7, 26.7]


def incoming(items: list[dict[str, Any]]) -> IncomingSamples:
    return to_incoming(SAMPLES.validate_python(items))


def requests() -> list[list[dict[str, Any]]]:
    """Eight requests in time order, the last four with phase 1's breaker tripped."""
    out = []
    for k in range(8):
        body = sample(k, TRIPPED if k >= 4 else HEALTHY)
        body["phases"][1]["breaker_tripped"] = k >= 4
        out.append([body])
    return out


@pytest.fixture
def transactions(monkeypatch: pytest.MonkeyPatch) -> list[dict[str, int]]:
    """Every group handed to the monitor: requests per rail (the real function still runs)."""
    groups: list[dict[str, int]] = []
    real = ingest_module.ingest_rails

    def spy(sessions: Any, work: list[tuple[str, list[IncomingSamples]]], **kw: Any) -> list[Any]:
        groups.append({rail_id: len(batches) for rail_id, batches in work})
        return real(sessions, work, **kw)

    monkeypatch.setattr("phaseward.api.group_commit.ingest_rails", spy)
    return groups


def sizes(transactions: list[dict[str, int]], rail_id: str = "bench-a") -> list[int]:
    return [group[rail_id] for group in transactions if rail_id in group]


async def submit_all(
    writer: GroupCommit, bodies: list[list[dict[str, Any]]]
) -> list[IngestResult | PhasewardError]:
    out: list[IngestResult | PhasewardError | None] = [None] * len(bodies)

    async def one(k: int) -> None:
        try:
            out[k] = await writer.submit("bench-a", incoming(bodies[k]))
        except PhasewardError as err:
            out[k] = err

    async with anyio.create_task_group() as tg:
        for k in range(len(bodies)):
            tg.start_soon(one, k)
    return [o for o in out if o is not None]


def live_state(app: FastAPI) -> dict[str, Any]:
    with transaction(app.state.sessions) as session:
        live = state_store.get(session, "bench-a")
        assert live is not None
        return live.state


def event_kinds(app: FastAPI) -> list[tuple[str, int | None]]:
    with transaction(app.state.sessions) as session:
        found = events.page(
            session, events.EventFilter(rail_id="bench-a"), before_id=None, limit=99
        )
        return sorted((e.kind, e.phase) for e in found)


async def test_concurrent_requests_share_one_pass_and_match_one_by_one_ingest(
    client: httpx.AsyncClient, app: FastAPI, transactions: list[dict[str, int]], tmp_path: Path
) -> None:
    assert (await client.post("/v1/rails", json=rail_spec())).status_code == 201
    writer = GroupCommit(app.state.sessions, max_samples=100)
    results = await submit_all(writer, requests())
    assert sizes(transactions) == [8]  # all eight queued behind the first drain: one transaction
    assert all(isinstance(r, IngestResult) and r.stored == 1 for r in results)
    grouped_state, grouped_events = live_state(app), event_kinds(app)

    # The same requests one by one, each its own transaction, in a second database.
    alone_db = {"database_url": f"sqlite:///{tmp_path / 'alone.db'}"}
    alone = create_app(app.state.settings.model_copy(update=alone_db))
    try:
        transport = httpx.ASGITransport(app=alone)
        async with httpx.AsyncClient(transport=transport, base_url="http://alone") as c:
            assert (await c.post("/v1/rails", json=rail_spec())).status_code == 201
        for body in requests():
            ingest(alone.state.sessions, "bench-a", incoming(body))
        single_state, single_events = live_state(alone), event_kinds(alone)
    finally:
        close(alone)
    assert grouped_events == single_events
    assert ("phase.isolated", 1) in grouped_events
    assert grouped_state["rail"]["condition"] == single_state["rail"]["condition"] == "degraded"
    assert [p["condition"] for p in grouped_state["phases"]] == [
        p["condition"] for p in single_state["phases"]
    ]
    # One Kalman run over eight equal steps against eight runs of one: the same estimate.
    np.testing.assert_allclose(grouped_state["nodes_c"], single_state["nodes_c"], rtol=1e-9)


async def test_a_bad_request_in_a_group_fails_alone_and_the_others_are_stored(
    client: httpx.AsyncClient, app: FastAPI, transactions: list[dict[str, int]]
) -> None:
    assert (await client.post("/v1/rails", json=rail_spec())).status_code == 201
    stored = await client.post("/v1/rails/bench-a/samples", json=sample(0, HEALTHY))
    assert stored.status_code == 200
    conflicting = [sample(1, HEALTHY), sample(0, [21.0] * 4)]  # seq 0 again, other content
    bodies = [[sample(2, HEALTHY)], conflicting, [sample(3, HEALTHY)], [sample(2, HEALTHY)]]
    writer = GroupCommit(app.state.sessions, max_samples=100)
    results = await submit_all(writer, bodies)

    assert sizes(transactions)[-1] == 4  # the four requests went as one group
    first, bad, third, resend = results
    assert isinstance(first, IngestResult)
    assert first.stored == 1
    assert isinstance(bad, Conflict)
    assert bad.field == "[1].seq"
    assert isinstance(third, IngestResult)
    assert third.stored == 1
    # seq 2 twice in one group: the later request is a resend of the earlier, not an error.
    assert isinstance(resend, IngestResult)
    assert (resend.stored, resend.duplicates) == (0, 1)
    window = await client.get("/v1/rails/bench-a/samples", params={"since": 0, "until": 4e9})
    assert window.json()["seq"] == [0, 2, 3]  # nothing of the refused request, seq 1 included
    kinds = [e["kind"] for e in (await client.get("/v1/events")).json()["items"]]
    assert kinds.count("telemetry.rejected") == 1


async def test_a_group_is_capped_in_samples(
    client: httpx.AsyncClient, app: FastAPI, transactions: list[dict[str, int]]
) -> None:
    assert (await client.post("/v1/rails", json=rail_spec())).status_code == 201
    writer = GroupCommit(app.state.sessions, max_samples=3)
    bodies = [[sample(2 * k, HEALTHY), sample(2 * k + 1, HEALTHY)] for k in range(4)]
    results = await submit_all(writer, bodies)
    assert all(isinstance(r, IngestResult) and r.stored == 2 for r in results)
    # Two samples each, at most three per group: every request goes alone, but the first only
    # as the rest queue up behind it.
    assert sizes(transactions) == [1, 1, 1, 1]


async def test_a_database_failure_reaches_every_request_of_the_group(
    client: httpx.AsyncClient, app: FastAPI, monkeypatch: pytest.MonkeyPatch
) -> None:
    assert (await client.post("/v1/rails", json=rail_spec())).status_code == 201

    def unreachable(*_: Any, **__: Any) -> list[Any]:
        raise ConnectionError("database went away")

    monkeypatch.setattr("phaseward.api.group_commit.ingest_rails", unreachable)
    writer = GroupCommit(app.state.sessions, max_samples=100)
    outcomes: list[BaseException] = []

    async def one(k: int) -> None:
        with pytest.raises(ConnectionError) as err:
            await writer.submit("bench-a", incoming([sample(k, HEALTHY)]))
        outcomes.append(err.value)

    async with anyio.create_task_group() as tg:
        for k in range(3):
            tg.start_soon(one, k)
    assert len(outcomes) == 3
    assert (writer._queue, writer._task) == ([], None)  # nothing left waiting


async def test_a_resend_racing_its_original_in_one_group_is_judged_once(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    """Two requests of one group carrying the same samples (a resend overlapping its original)
    once refused the merged batch ("sequence number appears twice"); each request then went
    alone in arrival order, and the later samples of the first-served request made the
    earlier ones late: never judged. Now the group stores and judges each sample once."""
    assert (await client.post("/v1/rails", json=rail_spec())).status_code == 201
    bodies = [[body for [body] in requests()[k : k + 4]] for k in (0, 4)]  # seq 0-3, 4-7
    resend = bodies[0][2:] + bodies[1]  # seq 2-7, overlapping the first request
    [late, early] = ingest_together(
        app.state.sessions, "bench-a", [incoming(resend), incoming(bodies[0])]
    )
    assert isinstance(late, IngestResult)
    assert isinstance(early, IngestResult)
    assert (late.stored, late.late, early.stored, early.duplicates) == (6, 0, 2, 2)
    assert early.late == 0  # seq 0 and 1 were judged, not taken as older than the live state
    assert ("phase.isolated", 1) in event_kinds(app)
    assert live_state(app)["sample"]["seq"] == 7


async def test_an_unexpected_failure_on_one_requests_data_fails_that_request_alone(
    client: httpx.AsyncClient,
    app: FastAPI,
    transactions: list[dict[str, int]],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Issue 17.5: one request's data that made the physics raise (not a refusal) failed the
    whole group, and other clients' good requests answered 500."""
    assert (await client.post("/v1/rails", json=rail_spec())).status_code == 201
    real = ingest_module.to_batch

    def fails_on_seq_13(incoming: IncomingSamples, model: Any) -> Any:
        if 13 in incoming.seq:  # stands in for a numeric failure no validation foresaw
            raise FloatingPointError("overflow in the loss model")
        return real(incoming, model)

    monkeypatch.setattr(ingest_module, "to_batch", fails_on_seq_13)
    bodies = [
        [sample(0, HEALTHY)],
        [sample(1, HEALTHY)],
        [sample(13, HEALTHY)],
        [sample(2, HEALTHY)],
    ]
    writer = GroupCommit(app.state.sessions, max_samples=100)
    outcomes: list[IngestResult | BaseException | None] = [None] * len(bodies)

    async def one(k: int) -> None:
        try:
            outcomes[k] = await writer.submit("bench-a", incoming(bodies[k]))
        except FloatingPointError as err:
            outcomes[k] = err

    async with anyio.create_task_group() as tg:
        for k in range(len(bodies)):
            tg.start_soon(one, k)
    assert sizes(transactions) == [4]  # the four went as one group, and the merged pass failed
    assert isinstance(outcomes[2], FloatingPointError)
    assert all(isinstance(outcomes[k], IngestResult) for k in (0, 1, 3))
    window = await client.get("/v1/rails/bench-a/samples", params={"since": 0, "until": 4e9})
    assert window.json()["seq"] == [0, 1, 2]


async def test_requests_for_many_rails_share_one_transaction_and_a_bad_one_fails_alone(
    client: httpx.AsyncClient,
    app: FastAPI,
    transactions: list[dict[str, int]],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """A fleet posts single samples, each request for another rail: they go as one group
    (one commit), each rail judged on its own; a refused request fails only its own rail's
    request, and the rails beside it are stored and judged as if it had not been there.
    The refusal, the lone request of its rail, is its answer: worked once (not again alone)
    and counted once into the rail's rejection episode."""
    rails = [f"fleet-{k}" for k in range(6)]
    for rail_id in rails:
        assert (await client.post("/v1/rails", json=rail_spec(id=rail_id))).status_code == 201
        assert (
            await client.post(f"/v1/rails/{rail_id}/samples", json=sample(0, HEALTHY))
        ).is_success
    bodies = {rail_id: [sample(1, TRIPPED)] for rail_id in rails}
    bodies["fleet-3"] = [sample(1, HEALTHY), sample(0, [21.0] * 4)]  # seq 0 with other content
    for body in bodies.values():
        body[0]["phases"][1]["breaker_tripped"] = True
    writer = GroupCommit(app.state.sessions, max_samples=100)
    outcomes: dict[str, IngestResult | PhasewardError] = {}
    passes: list[str] = []
    real_pass = ingest_module._ingest

    def counted(session: Any, rail_id: str, *args: Any, **kw: Any) -> Any:
        passes.append(rail_id)
        return real_pass(session, rail_id, *args, **kw)

    monkeypatch.setattr(ingest_module, "_ingest", counted)

    async def one(rail_id: str) -> None:
        try:
            outcomes[rail_id] = await writer.submit(rail_id, incoming(bodies[rail_id]))
        except PhasewardError as err:
            outcomes[rail_id] = err

    async with anyio.create_task_group() as tg:
        for rail_id in rails:
            tg.start_soon(one, rail_id)
    assert transactions[-1] == dict.fromkeys(rails, 1)  # one group, one request per rail
    assert isinstance(outcomes["fleet-3"], Conflict)
    assert outcomes["fleet-3"].field == "[1].seq"
    assert passes.count("fleet-3") == 1
    with transaction(app.state.sessions) as session:
        refusals = events.newest_of_kind(session, "fleet-3", rejections.KIND)
        assert refusals is not None
        assert refusals.details["samples"] == 2
    for rail_id in rails:
        window = await client.get(f"/v1/rails/{rail_id}/samples", params={"since": 0, "until": 4e9})
        status = (await client.get(f"/v1/rails/{rail_id}/status")).json()
        if rail_id == "fleet-3":
            assert window.json()["seq"] == [0]
            assert status["condition"] == "nominal"
            continue
        result = outcomes[rail_id]
        assert isinstance(result, IngestResult)
        assert (result.stored, result.condition) == (1, "degraded")
        assert window.json()["seq"] == [0, 1]
        assert status["phases"][1]["condition"] == "isolated"
    rejected = (await client.get("/v1/events", params={"kind": "telemetry.rejected"})).json()
    assert [e["rail_id"] for e in rejected["items"]] == ["fleet-3"]
