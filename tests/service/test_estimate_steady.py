"""The Kalman estimate in ingest takes the steady-gain fast path once a held load has let it
converge, and the live state and events still do not depend on how the samples were cut
(batches of 100 reach the fast path; batches of 20 are too short for it and stay on the
full filter)."""

from __future__ import annotations

from typing import Any

import httpx
import pytest
from fastapi import FastAPI
from tests.factories import rail_spec, sample
from tests.service.cuts import Ingestor, Trace
from tests.service.test_cut_invariance import assert_same_state

from phaseward.physics import estimator

pytestmark = pytest.mark.anyio
N_SAMPLES = 800  # at 1 s; with this board the filter converges after about 230 samples


async def test_held_load_reaches_the_fast_path_and_the_cut_does_not_matter(
    client: httpx.AsyncClient, app: FastAPI, monkeypatch: pytest.MonkeyPatch
) -> None:
    fast_steps: list[int] = []
    inner = estimator._steady_stretch

    def spy(*args: Any) -> Any:
        out = inner(*args)
        fast_steps.append(out[1].shape[0])
        return out

    monkeypatch.setattr(estimator, "_steady_stretch", spy)
    bodies = [
        sample(k, [22.0, 22.0, 23.0, 23.0], temps=55.0 + 0.1 * (k % 7)) for k in range(N_SAMPLES)
    ]
    board = {"to_ambient_k_per_w": 1.0, "capacitance_j_per_k": 20.0}  # settles in a minute
    trace = Trace("held", rail_spec(board=board), bodies)
    results = []
    for size in (100, 20):
        rail_id = f"held-{size}"
        answer = await client.post("/v1/rails", json=trace.spec | {"id": rail_id})
        assert answer.status_code == 201, answer.text
        rail = Ingestor(app.state.sessions, rail_id, trace)
        fast_steps.clear()
        for lo in range(0, N_SAMPLES, size):
            rail.post(lo, min(N_SAMPLES, lo + size))
        results.append((rail.events(), rail.live(), sum(fast_steps)))
    (events_100, live_100, fast_100), (events_20, live_20, fast_20) = results
    assert fast_100 > N_SAMPLES // 2  # most of the trace ran on the steady gain
    assert fast_20 == 0
    assert events_100 == events_20
    assert_same_state(live_100, live_20)
