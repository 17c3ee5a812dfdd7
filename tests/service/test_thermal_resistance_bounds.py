"""A subnormal thermal resistance (found by the fuzz test from the rail example) is refused with
422 naming the field, not a 500 from an overflowing conductance."""

from __future__ import annotations

from typing import Any

import httpx
import pytest
from tests.factories import rail_spec

pytestmark = pytest.mark.anyio


def board(value: float) -> dict[str, Any]:
    spec = rail_spec()
    spec["board"]["to_ambient_k_per_w"] = value
    return spec


def stage(value: float) -> dict[str, Any]:
    spec = rail_spec()
    spec["phase"]["thermal"][0]["r_k_per_w"] = value
    return spec


@pytest.mark.parametrize(
    ("spec", "field"),
    [
        (board(5e-324), "board.to_ambient_k_per_w"),
        (stage(5e-324), "phase.thermal[0].r_k_per_w"),
    ],
)
async def test_subnormal_thermal_resistance_is_refused(
    client: httpx.AsyncClient, spec: dict[str, Any], field: str
) -> None:
    answer = await client.post("/v1/rails", json=spec)
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
    assert (await client.get("/v1/rails")).json() == []
