"""Definitions that cannot be right are refused naming the field; unusual ones are stored with
warnings (monitor/sanity.py lists each rule and its basis)."""

from __future__ import annotations

import copy
from typing import Any

import httpx
import pytest
from tests.factories import SMALL_RAIL, rail_spec

pytestmark = pytest.mark.anyio


def _phase(**changes: Any) -> dict[str, Any]:
    phase = copy.deepcopy(SMALL_RAIL["phase"])
    phase.update(changes)
    return phase


def _body(**changes: Any) -> dict[str, Any]:
    body = rail_spec(**changes)
    del body["id"]
    return body


IMPOSSIBLE = [
    pytest.param(
        {"phase": _phase(overcurrent_limit_a=25.0)}, "phase.overcurrent_limit_a",
        "trip_below_rating", id="trip below rating",
    ),
    pytest.param(
        {"overrides": [{"index": 2, "overcurrent_limit_a": 20.0}]},
        "overrides[0].overcurrent_limit_a", "trip_below_rating", id="override trips below rating",
    ),
    pytest.param(
        {"overrides": [{"index": 1, "rated_current_a": 45.0}]},
        "overrides[0].rated_current_a", "trip_below_rating", id="override rates above the trip",
    ),
    pytest.param(
        {"overrides": [{"index": 1, "junction_limit_c": 30.0}]},
        "overrides[0].junction_limit_c", "warning_not_above_ambient",
        id="override limit leaves no room for the margin",
    ),
    pytest.param(
        {"ambient_c": 130.0}, "phase.junction_limit_c", "limit_not_above_ambient",
        id="junction limit below ambient",
    ),
    pytest.param(
        {"overrides": [{"index": 3, "junction_limit_c": 25.0}]},
        "overrides[0].junction_limit_c", "limit_not_above_ambient", id="limit at ambient",
    ),
    pytest.param(
        {"phase": _phase(warning_margin_k=100.0)}, "phase.warning_margin_k",
        "warning_not_above_ambient", id="margin wider than ambient to limit",
    ),
    pytest.param(
        {"phase": _phase(
            power_stage={**SMALL_RAIL["phase"]["power_stage"], "rds_ref_c": 500.0,
                         "rds_tc_per_k": 0.05},
        )},
        "phase.power_stage.rds_tc_per_k", "loss_vanishes_above_ambient",
        id="Rds(on) law negative at ambient",
    ),
    pytest.param(
        {"overrides": [{"index": 2, "loss_table": {
            "current_a": [0.0, 40.0], "loss_w": [0.5, 6.0], "ref_c": 125.0, "tc_per_k": 0.02,
        }}]},
        "overrides[0].loss_table.tc_per_k", "loss_vanishes_above_ambient",
        id="loss table law negative at ambient",
    ),
    pytest.param(
        {"phase": _phase(inductor={"inductance_h": 2e-7, "dcr_ohm": 1.0})},
        "phase.inductor.dcr_ohm", "winding_drop_exceeds_headroom", id="1 ohm DCR on 30 A",
    ),
    pytest.param(
        {"overrides": [{"index": 0, "inductor": {"inductance_h": 2e-7, "dcr_ohm": 0.4}}]},
        "overrides[0].inductor.dcr_ohm", "winding_drop_exceeds_headroom",
        id="override DCR drops more than vin - vout",
    ),
]  # fmt: skip


@pytest.mark.parametrize(("changes", "field", "rule"), IMPOSSIBLE)
async def test_an_impossible_definition_is_refused_naming_the_field(
    client: httpx.AsyncClient, changes: dict[str, Any], field: str, rule: str
) -> None:
    answer = await client.post("/v1/rails", json=rail_spec(**changes))
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
    assert answer.json()["detail"].startswith(rule)
    assert (await client.get("/v1/rails")).json() == []


@pytest.mark.parametrize(("changes", "field", "rule"), IMPOSSIBLE)
async def test_a_refused_put_leaves_the_stored_definition_unchanged(
    client: httpx.AsyncClient, changes: dict[str, Any], field: str, rule: str
) -> None:
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    before = (await client.get("/v1/rails/bench-a")).json()
    answer = await client.put("/v1/rails/bench-a", json=_body(**changes))
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
    assert (await client.get("/v1/rails/bench-a")).json() == before
    assert before["version"] == 1


UNUSUAL = [
    pytest.param({"load_a": 130.0}, "load_a", "load_above_ratings", id="load above ratings"),
    pytest.param(
        {"phase": _phase(junction_limit_c=60.0)}, "load_a", "load_above_capacity",
        id="load above thermal capacity",
    ),
    pytest.param(
        {"phase": _phase(
            thermal=[{"r_k_per_w": 20.0, "tau_s": 0.5}],
            power_stage={**SMALL_RAIL["phase"]["power_stage"], "rds_tc_per_k": 0.05},
        )},
        "load_a", "no_steady_state_at_load", id="runaway at rated load",
    ),
    pytest.param(
        {"phase": _phase(inductor={"inductance_h": 2e-7, "dcr_ohm": 5e-3})},
        "phase.inductor.dcr_ohm", "winding_loss_high", id="DCR loss implausible for rating",
    ),
    pytest.param(
        {"overrides": [
            {"index": 3, "loss_table": {"current_a": [0.0, 10.0], "loss_w": [0.5, 1.5]}}
        ]},
        "overrides[0].loss_table.current_a", "loss_table_short", id="short loss table",
    ),
]  # fmt: skip


@pytest.mark.parametrize(("changes", "field", "rule"), UNUSUAL)
async def test_an_unusual_definition_is_stored_with_a_warning(
    client: httpx.AsyncClient, changes: dict[str, Any], field: str, rule: str
) -> None:
    created = await client.post("/v1/rails", json=rail_spec(**changes))
    assert created.status_code == 201, created.text
    assert {(w["rule"], w["field"]) for w in created.json()["warnings"]} >= {(rule, field)}
    put = await client.put("/v1/rails/bench-a", json=_body(**changes))
    assert put.status_code == 200, put.text
    assert rule in {w["rule"] for w in put.json()["warnings"]}
    assert (await client.get("/v1/rails/bench-a")).json()["version"] == 2


async def test_a_usual_definition_has_no_warnings(client: httpx.AsyncClient) -> None:
    created = await client.post("/v1/rails", json=SMALL_RAIL)
    assert created.status_code == 201
    assert created.json()["warnings"] == []


@pytest.mark.parametrize(
    ("changes", "field"),
    [
        ({"load_a": 2.7e307}, "load_a"),
        ({"vin_v": 1e300, "vout_v": 1.0}, "vin_v"),
        ({"switching_hz": 1e-300}, "switching_hz"),
        ({"ambient_c": -200.0}, "ambient_c"),
        ({"phase": _phase(rated_current_a=1e200)}, "phase.rated_current_a"),
        ({"phase": _phase(core_loss_w=1e300)}, "phase.core_loss_w"),
        ({"phase": _phase(junction_limit_c=999.0)}, "phase.junction_limit_c"),
        ({"phase": _phase(share_target=0.0)}, "phase.share_target"),
        ({"phase": _phase(sense_gain=1e6)}, "phase.sense_gain"),
        ({"board": {"to_ambient_k_per_w": 1.0, "capacitance_j_per_k": 1e300}},
         "board.capacitance_j_per_k"),
        ({"monitor": {"forecast_horizon_s": 1e300}}, "monitor.forecast_horizon_s"),
        ({"monitor": {"share_learning_rate": 0.0}}, "monitor.share_learning_rate"),
        ({"output": {"capacitance_f": 1e-300}}, "output.capacitance_f"),
        ({"reliability": {"fit_at_ref": 1e300, "ref_c": 55.0}}, "reliability.fit_at_ref"),
        ({"overrides": [{"index": 0, "rated_current_a": 1e300}]}, "overrides[0].rated_current_a"),
    ],
)  # fmt: skip
async def test_every_definition_field_has_a_physical_range(
    client: httpx.AsyncClient, changes: dict[str, Any], field: str
) -> None:
    answer = await client.post("/v1/rails", json=rail_spec(**changes))
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
