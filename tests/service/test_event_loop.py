"""Issue 17 item 4: a large trace upload and a large calibration do not stall the event loop.

/healthz is polled while each runs, and polls must be answered while the heavy part (the CSV
parse, the fit) runs: on the event loop it would hold every poll until it ends. Neither timed
nor counted against the clock: the heavy part, once done, waits until MIN_ANSWERED polls have
been answered since it began. Off the loop they are, however slowly a loaded machine serves
them; on the loop none can be, the wait runs out, and the test fails. (A bound on the worst
poll, and later a count of polls within the parse's own time, both failed under CI load with
the parse correctly off the loop.)"""

from __future__ import annotations

import threading
import time
from collections.abc import AsyncIterator, Awaitable, Callable
from typing import Any

import anyio
import httpx
import numpy as np
import pytest
from fastapi import FastAPI
from tests.factories import SMALL_RAIL

from phaseward.api.app import close, create_app
from phaseward.api.routes import analyses as analyses_routes
from phaseward.api.routes import traces as traces_routes
from phaseward.settings import Settings

pytestmark = pytest.mark.anyio
ROWS = 120_000  # about 4 MB of CSV
PAUSE_S = 0.02  # between polls of /healthz
MIN_ANSWERED = 3  # polls answered while the heavy part runs
PATIENCE_S = 20.0  # how long the heavy part waits for them: ample off the loop


@pytest.fixture
async def big(settings: Settings) -> AsyncIterator[httpx.AsyncClient]:
    app: FastAPI = create_app(settings.model_copy(update={"max_body_bytes": 8 << 20}))
    transport = httpx.ASGITransport(app=app)
    async with httpx.AsyncClient(transport=transport, base_url="http://loop.test") as c:
        yield c
    close(app)


async def polls_answered_during(
    c: httpx.AsyncClient,
    work: Callable[[], Awaitable[httpx.Response]],
    heavy: tuple[object, str],
    monkeypatch: pytest.MonkeyPatch,
) -> tuple[int, httpx.Response]:
    """(how many /healthz polls were answered while the function ``heavy`` (module, name)
    ran inside ``work``, the work's answer)."""
    span: list[float] = []
    real = getattr(*heavy)
    polled = threading.Event()

    def timed(*args: Any, **kw: Any) -> Any:
        span.append(time.perf_counter())
        try:
            return real(*args, **kw)
        finally:
            polled.wait(PATIENCE_S)  # on the event loop this only runs out
            span.append(time.perf_counter())

    monkeypatch.setattr(*heavy, timed)
    answered_at: list[float] = []
    answer: list[httpx.Response] = []
    done = anyio.Event()

    async def run() -> None:
        answer.append(await work())
        done.set()

    async with anyio.create_task_group() as tasks:
        tasks.start_soon(run)
        while not done.is_set():
            await anyio.sleep(PAUSE_S)
            assert (await c.get("/healthz")).status_code == 200
            answered_at.append(time.perf_counter())
            if len(span) == 1 and sum(t > span[0] for t in answered_at) >= MIN_ANSWERED:
                polled.set()
    assert len(span) == 2, "the heavy part did not run once"
    return sum(span[0] < t < span[1] for t in answered_at), answer[0]


async def test_healthz_answers_during_a_large_upload_and_calibration(
    big: httpx.AsyncClient, monkeypatch: pytest.MonkeyPatch
) -> None:
    rows = [f"{k},12,10,10,10,10" for k in range(ROWS)]
    csv_body = "time_s,vin_v,i0_a,i1_a,i2_a,i3_a\n" + "\n".join(rows)

    async def upload() -> httpx.Response:
        return await big.post(
            "/v1/traces", content=csv_body.encode(), headers={"content-type": "text/csv"}
        )

    answered, answer = await polls_answered_during(
        big, upload, (traces_routes, "_csv"), monkeypatch
    )
    assert answer.status_code == 201, answer.text
    assert answer.json()["n_samples"] == ROWS
    assert answered >= MIN_ANSWERED  # parsed on the event loop: none

    assert (await big.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    t = np.linspace(0.0, 300.0, 1_500)
    rise = (np.array([2.0, 6.0]) * (1 - np.exp(-t[:, None] / np.array([0.5, 20.0])))).sum(1)
    curve = {"t_s": t.tolist(), "temp_c": (25.0 + 3.0 * rise).tolist(), "power_w": 3.0,
             "orders": [1, 2]}  # fmt: skip

    async def calibrate() -> httpx.Response:
        return await big.post("/v1/rails/bench-a/calibrations", json=curve)

    answered, answer = await polls_answered_during(
        big, calibrate, (analyses_routes.calibrations, "calibrate"), monkeypatch
    )
    assert answer.status_code == 200, answer.text
    assert answered >= MIN_ANSWERED
