"""Health, readiness, metrics (OpenMetrics text), and request ids on JSON log lines."""

from __future__ import annotations

import json
import logging

import httpx
import pytest
from tests.factories import SMALL_RAIL, sample

from phaseward.api.observability import JsonLines, request_id

pytestmark = pytest.mark.anyio


async def test_health_and_readiness(client: httpx.AsyncClient) -> None:
    assert (await client.get("/healthz")).json()["status"] == "ok"
    assert (await client.get("/readyz")).json() == {"status": "ready"}


async def test_readiness_fails_without_the_newest_schema(
    client: httpx.AsyncClient, app: object
) -> None:
    from sqlalchemy import text

    with app.state.engine.begin() as conn:  # type: ignore[attr-defined]
        conn.execute(text("UPDATE alembic_version SET version_num = '0001'"))
    answer = await client.get("/readyz")
    assert answer.status_code == 503
    assert "newest migration" in answer.json()["detail"]


async def test_metrics_in_openmetrics_text(client: httpx.AsyncClient) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    await client.post("/v1/rails/bench-a/samples", json=[sample(k, [20.0] * 4) for k in range(3)])
    await client.post(
        "/v1/rails/bench-a/samples", json=[sample(9, [20.0] * 4), sample(9, [20.0] * 4)]
    )
    answer = await client.get("/metrics")
    assert answer.headers["content-type"].startswith("application/openmetrics-text")
    lines = answer.text.splitlines()
    assert lines[-1] == "# EOF"
    assert "phaseward_samples_accepted_total 3" in lines
    assert "phaseward_samples_rejected_total 2" in lines  # the batch with a repeated seq
    assert 'phaseward_rail_condition{rail="bench-a",phaseward_rail_condition="nominal"} 1' in lines
    assert 'phaseward_rail_capacity_amperes{rail="bench-a"} 120' in lines
    assert any(
        line.startswith('phaseward_rail_thermal_margin_kelvin{rail="bench-a"}') for line in lines
    )
    ingest = 'phaseward_request_seconds_count{method="POST",route="/v1/rails/{rail_id}/samples"'
    count = [line for line in lines if line.startswith(ingest)]
    assert {line.split('status="')[1][:3] for line in count} == {"2xx", "4xx"}


async def test_every_answer_carries_a_request_id(client: httpx.AsyncClient) -> None:
    mine = await client.get("/healthz", headers={"x-request-id": "rack-b4-0042"})
    assert mine.headers["x-request-id"] == "rack-b4-0042"
    assert len((await client.get("/healthz")).headers["x-request-id"]) == 16


def test_log_lines_are_json_with_the_request_id() -> None:
    record = logging.LogRecord(
        "phaseward.access", logging.INFO, __file__, 1, "GET %s", ("/x",), None
    )
    token = request_id.set("abc123")
    try:
        line = json.loads(JsonLines().format(record))
    finally:
        request_id.reset(token)
    assert line["request_id"] == "abc123"
    assert line["message"] == "GET /x"
    assert line["level"] == "info"
