"""The monitor pass run in a helper process (``PHASEWARD_JUDGE_APART``) judges as the pass in
the server's own process does: every invented trace, posted one sample per request, ends with
the same events and live state as the reference judged in process. A helper that dies costs
nothing but its process (the pass is judged in the server, the next starts a new helper); a
pass that fails in the helper fails in the server with the same exception."""

from __future__ import annotations

import gc
import multiprocessing
import pickle
import weakref
from collections.abc import Iterator
from dataclasses import replace

import httpx
import pytest
from fastapi import FastAPI
from tests.conftest import MakeSettings
from tests.factories import rail_spec, sample
from tests.service.cuts import TRACES, Ingestor, incoming
from tests.service.test_cut_invariance import assert_same_state, new_rail, reference

from phaseward.api.app import close, create_app
from phaseward.monitor import rail_model
from phaseward.monitor.ingest import TOLERANCES, Tuning, advance, ingest
from phaseward.monitor.judge_apart import JudgeApart, Networks, shared_network
from phaseward.monitor.rail_model import RailModel
from phaseward.monitor.telemetry import SampleBatch, to_batch
from phaseward.store import rails
from phaseward.store.db import transaction

pytestmark = pytest.mark.anyio


@pytest.fixture(scope="module")
def judge() -> Iterator[JudgeApart]:
    apart = JudgeApart(kept_models=2, blas_threads=1)  # fewer models than rails: some resent
    yield apart
    apart.close()


def post_all(rail: Ingestor, tuning: Tuning) -> None:
    for k in range(len(rail.trace.samples)):
        ingest(rail.sessions, rail.rail_id, incoming(rail.trace.samples[k : k + 1]), tuning=tuning)


@pytest.mark.parametrize("name", sorted(TRACES))
async def test_every_trace_ends_as_judged_in_process(
    client: httpx.AsyncClient, app: FastAPI, judge: JudgeApart, name: str
) -> None:
    want_events, want_state = await reference(client, app, TRACES[name])
    rail = await new_rail(client, app, TRACES[name])
    post_all(rail, Tuning(monitor_pass=judge))
    assert rail.events() == want_events
    assert_same_state(rail.live(), want_state)


async def test_a_dead_helper_is_replaced_and_loses_no_pass(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    trace = TRACES[sorted(TRACES)[0]]
    want_events, want_state = await reference(client, app, trace)
    rail = await new_rail(client, app, trace)
    judge = JudgeApart(kept_models=8, blas_threads=1)
    tuning = Tuning(monitor_pass=judge)
    try:
        killed = []
        for k in range(len(trace.samples)):
            if k in (3, 9):  # the helper dies between two passes
                helper = judge._helper
                assert helper is not None
                helper[0].kill()
                helper[0].join()
                killed.append(helper[0].pid)
            one = incoming(trace.samples[k : k + 1])
            ingest(rail.sessions, rail.rail_id, one, tuning=tuning)
        assert judge._helper is not None
        assert judge._helper[0].pid not in killed
    finally:
        judge.close()
    assert judge._helper is None
    assert rail.events() == want_events
    assert_same_state(rail.live(), want_state)


async def one_sample(
    client: httpx.AsyncClient, app: FastAPI, rail_id: str
) -> tuple[RailModel, SampleBatch]:
    """A new rail's model and one sample of it as a batch."""
    assert (await client.post("/v1/rails", json=rail_spec(id=rail_id))).status_code == 201
    with transaction(app.state.sessions) as session:
        model = rail_model.build(rail_id, 1, rails.spec(session, rail_id, 1))
    return model, to_batch(incoming([sample(0, [20.0] * 4)]), model)


async def test_a_helper_that_cannot_start_leaves_the_pass_to_the_server(
    client: httpx.AsyncClient, app: FastAPI, monkeypatch: pytest.MonkeyPatch
) -> None:
    model, batch = await one_sample(client, app, "no-helper")

    def refuse(self: object) -> None:
        raise AssertionError("daemonic processes are not allowed to have children")

    monkeypatch.setattr(multiprocessing.get_context("spawn").Process, "start", refuse)
    judge = JudgeApart(kept_models=8, blas_threads=1)
    assert judge(model, batch, {}, TOLERANCES) == advance(model, batch, {}, TOLERANCES)
    assert judge._helper is None


async def test_a_pass_that_fails_in_the_helper_raises_its_exception(
    client: httpx.AsyncClient, app: FastAPI, judge: JudgeApart
) -> None:
    model, batch = await one_sample(client, app, "fails")
    broken = {"watch": {}}  # a live state without its fields
    with pytest.raises(TypeError) as inline:
        advance(model, batch, broken, TOLERANCES)
    with pytest.raises(TypeError) as apart:
        judge(model, batch, broken, TOLERANCES)
    assert apart.value.args == inline.value.args
    helper = judge._helper
    assert helper is not None
    assert helper[0].is_alive()
    state, findings = judge(model, batch, {}, TOLERANCES)
    assert (state, findings) == advance(model, batch, {}, TOLERANCES)


async def test_the_setting_runs_the_passes_apart(make_settings: MakeSettings) -> None:
    app = create_app(make_settings(judge_apart=True))
    judge = app.state.tuning.monitor_pass
    assert isinstance(judge, JudgeApart)
    transport = httpx.ASGITransport(app=app)
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as c:
        assert (await c.post("/v1/rails", json=rail_spec(id="apart"))).status_code == 201
        for seq in range(3):
            answer = await c.post("/v1/rails/apart/samples", json=sample(seq, [20.0] * 4))
            assert answer.status_code == 200, answer.text
        status = (await c.get("/v1/rails/apart/status")).json()
    assert status["last_sample"]["seq"] == 2
    assert status["condition"] == "nominal"
    assert judge._helper is not None  # the passes went to the helper
    close(app)
    assert judge._helper is None


async def test_models_of_one_design_share_their_network_in_the_helper(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    """Pickled, every model brings its own copy of its network; the helper keeps one network
    per set of values (the physics caches its propagators and Riccati solutions per network
    object), and lets it go with the last model that holds it."""
    one, _ = await one_sample(client, app, "design-a-1")
    two, _ = await one_sample(client, app, "design-a-2")
    assert (
        await client.post("/v1/rails", json=rail_spec(id="design-b", phase_count=6))
    ).status_code == 201
    with transaction(app.state.sessions) as session:
        other = rail_model.build("design-b", 1, rails.spec(session, "design-b", 1))
    arrived = [pickle.loads(pickle.dumps(m)) for m in (one, two, other)]
    assert len({id(m.network) for m in arrived}) == 3
    networks: Networks = weakref.WeakValueDictionary()
    kept = [shared_network(m, networks) for m in arrived]
    assert kept[0] is arrived[0]  # the first of its design keeps its own
    assert kept[1].network is kept[0].network
    assert kept[2].network is not kept[0].network
    assert replace(kept[1], network=arrived[1].network) == arrived[1]  # nothing else changed
    assert len(networks) == 2
    del kept, arrived, one, two, other
    gc.collect()
    assert len(networks) == 0
