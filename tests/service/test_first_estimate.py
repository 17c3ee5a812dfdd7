"""A fresh rail's first estimate starts from its first sample's sensors (issue 12 item 4):
once it reported the steady state of the first losses, 49.6 degC +- 5 K, while every sensor
read about 40 degC, and recovered only by the tenth sample."""

from __future__ import annotations

import httpx
import pytest
from tests.factories import SMALL_RAIL, sample

pytestmark = pytest.mark.anyio


async def test_the_first_status_agrees_with_the_first_readings(client: httpx.AsyncClient) -> None:
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    # 28 A per phase: the steady state of these losses is far above 40 degC.
    body = sample(0, [28.0] * 4, temps=40.0)
    assert (await client.post("/v1/rails/bench-a/samples", json=body)).status_code == 200
    thermal = (await client.get("/v1/rails/bench-a/status")).json()["thermal"]
    assert max(thermal["steady_junction_c"]) > 48.0
    for estimate, std in zip(
        thermal["estimated_junction_c"], thermal["junction_std_k"], strict=True
    ):
        assert estimate == pytest.approx(40.0, abs=1.0)
        assert 0.3 < std < 3.0  # about the sensor noise: the default sensor reads the junction
