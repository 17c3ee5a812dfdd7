"""Input that must never reach the monitor: samples dated ahead of the service's clock (the
clock policy), values beyond what can be a reading at all, and JSON nested past the parser."""

from __future__ import annotations

import json
from collections.abc import AsyncIterator
from typing import Any

import httpx
import pytest
from fastapi import FastAPI
from tests.factories import SMALL_RAIL, sample

from phaseward.api.app import close, create_app
from phaseward.settings import Settings

pytestmark = pytest.mark.anyio
EVEN = [20.0, 20.0, 20.0, 20.0]
NOW_S = 1.8e9 + 100.0  # the service's clock in these tests (samples are dated 1.8e9 + seq)


@pytest.fixture
async def clocked(settings: Settings) -> AsyncIterator[httpx.AsyncClient]:
    """The app with the default clock skew and a fixed clock."""
    app: FastAPI = create_app(
        settings.model_copy(update={"future_skew_s": Settings().future_skew_s}),
        clock=lambda: NOW_S,
    )
    transport = httpx.ASGITransport(app=app)
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as c:
        assert (await c.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
        yield c
    close(app)


async def window(client: httpx.AsyncClient) -> list[int]:
    got = await client.get("/v1/rails/bench-a/samples", params={"since": 0, "until": 1e10})
    assert got.status_code == 200, got.text
    seqs: list[int] = got.json()["seq"]
    return seqs


def test_the_default_skew_is_about_a_minute() -> None:
    assert Settings().future_skew_s == 60.0


async def test_a_sample_beyond_the_skew_is_refused_and_nothing_of_its_batch_stored(
    clocked: httpx.AsyncClient,
) -> None:
    assert (
        await clocked.post("/v1/rails/bench-a/samples", json=sample(0, EVEN))
    ).status_code == 200
    before = (await clocked.get("/v1/rails/bench-a/status")).json()
    # 161 s after 1.8e9 is 61 s ahead of the clock: one second beyond the allowed minute.
    batch = [sample(1, EVEN), sample(2, EVEN), sample(161, [0.0, 26.7, 26.7, 26.7])]
    answer = await clocked.post("/v1/rails/bench-a/samples", json=batch)
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == "[2].time"
    assert "ahead of this server's clock" in answer.json()["detail"]
    assert await window(clocked) == [0]
    assert (await clocked.get("/v1/rails/bench-a/status")).json() == before
    kinds = [e["kind"] for e in (await clocked.get("/v1/events")).json()["items"]]
    assert kinds.count("telemetry.rejected") == 1


async def test_a_wrong_clock_cannot_freeze_the_live_state(clocked: httpx.AsyncClient) -> None:
    """The measured case: one sample a year ahead made every later one `late`."""
    year_ahead = sample(1, EVEN, t0=1.8e9 + 365 * 86400)
    refused = await clocked.post("/v1/rails/bench-a/samples", json=year_ahead)
    assert refused.status_code == 422
    assert refused.json()["field"] == "[0].time"
    tripped = [sample(k, [26.7, 0.0, 26.7, 26.7]) for k in range(2, 5)]
    for body in tripped:
        body["phases"][1]["breaker_tripped"] = True
    answer = await clocked.post("/v1/rails/bench-a/samples", json=tripped)
    assert answer.json()["late"] == 0
    status = (await clocked.get("/v1/rails/bench-a/status")).json()
    assert status["phases"][1]["condition"] == "isolated"
    assert status["condition"] != "nominal"


async def test_age_is_honest_for_samples_ahead_within_the_skew(
    clocked: httpx.AsyncClient,
) -> None:
    ahead = sample(130, EVEN)  # 30 s ahead of the clock, inside the allowed minute
    assert (await clocked.post("/v1/rails/bench-a/samples", json=ahead)).status_code == 200
    last = (await clocked.get("/v1/rails/bench-a/status")).json()["last_sample"]
    assert last["age_s"] == pytest.approx(-30.0)
    assert last["ahead_of_clock"] is True
    behind = sample(131, EVEN, t0=1.8e9 - 200)  # seq 131 dated 69 s before the clock
    assert (await clocked.post("/v1/rails/bench-a/samples", json=behind)).status_code == 200
    # Older than the live state: stored, but the newest sample is still the one ahead.
    last = (await clocked.get("/v1/rails/bench-a/status")).json()["last_sample"]
    assert (last["seq"], last["ahead_of_clock"]) == (130, True)


@pytest.mark.parametrize(
    ("where", "value", "field"),
    [
        ("current_a", 1e300, "[0].phases[0].current_a"),
        ("current_a", -1.5e9, "[0].phases[0].current_a"),
        ("sense_v", 1e300, "[0].phases[0].sense_v"),
        ("vin_v", 1e7, "[0].vin_v"),
        ("vout_v", 1e300, "[0].vout_v"),
        ("iout_a", 1e300, "[0].iout_a"),
        ("temp_c", 1e300, "[0].phases[0].temp_c"),
        ("ambient_c", -300.0, "[0].ambient_c"),
    ],
)
async def test_values_beyond_any_reading_are_refused_naming_the_field(
    client: httpx.AsyncClient, where: str, value: float, field: str
) -> None:
    """Issue 17.5: 1e300 A passed validation and failed in the physics with a 500."""
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    assert (await client.post("/v1/rails/bench-a/samples", json=sample(0, EVEN))).status_code == 200
    body: dict[str, Any] = sample(1, EVEN)
    if where in ("current_a", "sense_v", "temp_c"):
        body["phases"][0].pop("current_a")
        body["phases"][0][where] = value
        if where == "temp_c":
            body["phases"][0]["current_a"] = 20.0
    else:
        body[where] = value
    answer = await client.post("/v1/rails/bench-a/samples", json=body)
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
    assert await window(client) == [0]


def nested(depth: int) -> str:
    return '{"time": ' + "[" * depth + "]" * depth + "}"


async def test_deeply_nested_json_is_a_400_naming_the_body(client: httpx.AsyncClient) -> None:
    """Issue 17.8: 5,000 levels hit the parser's recursion limit and answered 500."""
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    json_type = {"content-type": "application/json"}
    ndjson_type = {"content-type": "application/x-ndjson"}
    for path, body, headers, field in [
        ("/v1/rails/bench-a/samples", nested(5000), json_type, "body"),
        ("/v1/rails/bench-a/samples", nested(5000) + "\n", ndjson_type, "line 1"),
        ("/v1/traces", nested(5000), json_type, "body"),
        ("/v1/traces", json.dumps(sample(0, EVEN)) + "\n" + nested(5000), ndjson_type, "line 2"),
    ]:
        answer = await client.post(path, content=body, headers=headers)
        assert answer.status_code == 400, (path, answer.text)
        assert answer.json()["field"] == field
        assert "nested too deeply" in answer.json()["detail"]
    assert await window(client) == []
