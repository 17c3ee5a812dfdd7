"""Rail definitions through the API: versions, and refusals that name the field."""

from __future__ import annotations

from typing import Any

import httpx
import pytest
from tests.factories import SMALL_RAIL, rail_spec

pytestmark = pytest.mark.anyio


async def test_create_get_list(client: httpx.AsyncClient) -> None:
    created = await client.post("/v1/rails", json=SMALL_RAIL)
    assert created.status_code == 201, created.text
    assert created.json()["version"] == 1
    got = await client.get("/v1/rails/bench-a")
    assert got.status_code == 200
    assert got.json()["spec"]["phase_count"] == 4
    listed = await client.get("/v1/rails")
    assert [r["id"] for r in listed.json()] == ["bench-a"]


async def test_create_twice_conflicts(client: httpx.AsyncClient) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    again = await client.post("/v1/rails", json=SMALL_RAIL)
    assert again.status_code == 409
    assert again.json()["field"] == "id"


async def test_put_makes_a_new_version_and_keeps_the_old(client: httpx.AsyncClient) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    body = rail_spec(load_a=80.0)
    del body["id"]
    put = await client.put("/v1/rails/bench-a", json=body)
    assert put.status_code == 200, put.text
    assert put.json()["version"] == 2
    assert (await client.get("/v1/rails/bench-a")).json()["spec"]["load_a"] == 80.0


async def test_put_creates_a_missing_rail(client: httpx.AsyncClient) -> None:
    body = rail_spec()
    del body["id"]
    put = await client.put("/v1/rails/new-rail", json=body)
    assert put.status_code == 201
    assert put.json()["version"] == 1


async def test_delete(client: httpx.AsyncClient) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    assert (await client.delete("/v1/rails/bench-a")).status_code == 204
    assert (await client.get("/v1/rails/bench-a")).status_code == 404
    assert (await client.delete("/v1/rails/bench-a")).status_code == 404


def _phase(**changes: Any) -> dict[str, Any]:
    phase = dict(SMALL_RAIL["phase"])
    phase.update(changes)
    return phase


@pytest.mark.parametrize(
    ("changes", "field"),
    [
        ({"vout_v": 12.0}, "vout_v"),
        ({"vout_v": 15.0}, "vout_v"),
        ({"phase_count": 0}, "phase_count"),
        ({"overrides": [{"index": 1}, {"index": 1}]}, "overrides"),
        ({"overrides": [{"index": 7}]}, "overrides"),
        (
            {"phase": _phase(inductor={"inductance_h": 1e-7, "dcr_ohm": -1e-3})},
            "phase.inductor.dcr_ohm",
        ),
        ({"phase": _phase(thermal=[])}, "phase.thermal"),
        ({"id": "Not A Slug"}, "id"),
        ({"board": {"to_ambient_k_per_w": 1.0}}, "board.capacitance_j_per_k"),
        ({"vin_v": "twelve"}, "vin_v"),
    ],
)
async def test_impossible_definitions_name_the_field(
    client: httpx.AsyncClient, changes: dict[str, Any], field: str
) -> None:
    await client.post("/v1/rails", json=rail_spec(id="kept"))
    answer = await client.post("/v1/rails", json=rail_spec(**changes))
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
    assert field.split(".")[-1] in answer.json()["detail"]
    listed = (await client.get("/v1/rails")).json()
    assert [r["id"] for r in listed] == ["kept"]


@pytest.mark.parametrize("token", ["NaN", "Infinity", "-Infinity"])
async def test_non_finite_numbers_are_refused(client: httpx.AsyncClient, token: str) -> None:
    import json

    text = json.dumps(rail_spec()).replace('"load_a": 90.0', f'"load_a": {token}')
    answer = await client.post(
        "/v1/rails", content=text, headers={"content-type": "application/json"}
    )
    assert answer.status_code == 422
    assert answer.json()["field"] == "load_a"


async def test_override_replaces_the_loss_model(client: httpx.AsyncClient) -> None:
    table = {"current_a": [0.0, 10.0, 30.0], "loss_w": [0.5, 1.2, 4.0]}
    spec = rail_spec(overrides=[{"index": 3, "loss_table": table, "rated_current_a": 25.0}])
    answer = await client.post("/v1/rails", json=spec)
    assert answer.status_code == 201, answer.text
