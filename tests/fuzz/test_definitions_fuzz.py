"""Hypothesis over rail definitions near float limits and the edges of every field's range.

Each example posts a definition whose numbers are drawn from the edges of the ranges the
schema declares (the bound itself, one float inside it, a log-uniform value between the
bounds, now and then one beyond), then a few samples, then asks every analysis of the stored
definition: status (with ripple), N-1 and N-2 screening, forecasts (steps and ramps), ratings
(with pairs), reliability, the breaker tool on the definition's numbers. A definition is
refused with 422 naming a field, or stored; and no answer about a stored definition is ever
a 5xx.
"""

from __future__ import annotations

import copy
import itertools
import math
import time
from typing import Any

import httpx
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from tests.factories import SMALL_RAIL

from phaseward.api.schemas.rails import RailCreate

pytestmark = pytest.mark.anyio
EXAMPLES = settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
RAIL_NUMBERS = itertools.count()
SCHEMA = RailCreate.model_json_schema()
Json = dict[str, Any]

BASE: Json = copy.deepcopy(SMALL_RAIL) | {
    "reliability": {"fit_at_ref": 50.0, "ref_c": 55.0, "activation_ev": 0.7},
    "output": {"capacitance_f": 1e-3, "esr_ohm": 1e-3},
    "overrides": [
        {"index": 1, "loss_table": {"current_a": [0.0, 20.0, 40.0], "loss_w": [0.5, 2.0, 6.0],
                                    "ref_c": 25.0, "tc_per_k": 0.002},
         "share_target": 1.2, "sense_gain": 1.0, "sense_offset_a": 0.0},
    ],
}  # fmt: skip
BASE["phase"]["power_stage"] |= {
    "rds_ref_c": 25.0, "rds_tc_per_k": 0.004, "drive_v": 5.0, "diode_drop_v": 0.7,
}  # fmt: skip
BASE["phase"] |= {"share_target": 1.0, "sense_gain": 1.0, "sense_offset_a": 0.0}
BASE["phase"]["inductor"]["dcr_ref_c"] = 20.0
BASE["monitor"] |= {
    "gap_s": 10.0, "forecast_horizon_s": 900.0, "hysteresis_k": 2.0, "process_noise_w": 0.2,
    "sensor_noise_k": 0.5, "sensor_tau_s": 2.0, "share_learning_rate": 0.2,
    "share_significance": 5.0, "sensor_offset_k": 0.0, "collapse_fraction": 0.1,
    "imbalance_pct": 25.0, "min_share_load_fraction": 0.2, "undervoltage_fraction": 0.85,
    "excursion_fraction": 0.05,
}  # fmt: skip


def _resolve(node: Json) -> Json:
    while True:
        if "$ref" in node:
            node = SCHEMA["$defs"][node["$ref"].rsplit("/", 1)[-1]]
        elif "anyOf" in node:
            node = next(n for n in node["anyOf"] if n.get("type") != "null")
        else:
            return node


def bounds(path: tuple[str | int, ...]) -> tuple[float, float]:
    """The range the schema declares for the number at ``path`` (open ends as given)."""
    node = _resolve(SCHEMA)
    for key in path:
        node = _resolve(node["items"] if isinstance(key, int) else node["properties"][key])
    lo = node.get("minimum", node.get("exclusiveMinimum", -1.7e308))
    hi = node.get("maximum", node.get("exclusiveMaximum", 1.7e308))
    if "exclusiveMinimum" in node:
        lo = math.nextafter(lo, math.inf)
    if "exclusiveMaximum" in node:
        hi = math.nextafter(hi, -math.inf)
    return float(lo), float(hi)


def leaves(doc: Any, path: tuple[str | int, ...] = ()) -> list[tuple[str | int, ...]]:
    """Paths of every float in ``doc``."""
    if isinstance(doc, dict):
        return [p for k, v in doc.items() for p in leaves(v, (*path, k))]
    if isinstance(doc, list):
        return [p for k, v in enumerate(doc) for p in leaves(v, (*path, k))]
    return [path] if isinstance(doc, float) else []


NUMBERS = leaves(BASE)


@st.composite
def edge(draw: st.DrawFn, lo: float, hi: float) -> float:
    """A number at or near an end of [lo, hi], or inside it spread over its decades."""
    if draw(st.integers(0, 2)) == 0:
        return draw(st.sampled_from([lo, hi, math.nextafter(lo, hi), math.nextafter(hi, lo)]))
    if lo > 0:
        return min(hi, max(lo, 10 ** draw(st.floats(math.log10(lo), math.log10(hi)))))
    return draw(st.floats(lo, hi, allow_nan=False, allow_infinity=False))


BEYOND = st.sampled_from([2.7e307, -2.7e307, 1.7e308, 5e-324, -5e-324, 1e-300])


def _set(spec: Json, path: tuple[str | int, ...], value: float) -> None:
    target = spec
    for key in path[:-1]:
        target = target[key]
    target[path[-1]] = value


@st.composite
def definitions(draw: st.DrawFn) -> Json:
    """Most fields at their usual value, some at or near their range edges, and in one example
    of four one field beyond its range (near a float limit)."""
    spec = copy.deepcopy(BASE)
    spec["id"] = f"fuzz-{next(RAIL_NUMBERS)}"
    spec["phase_count"] = draw(st.integers(2, 6))
    for path in NUMBERS:
        if draw(st.integers(0, 7)) == 0:
            _set(spec, path, draw(edge(*bounds(path))))
    if draw(st.integers(0, 3)) == 0:
        path = draw(st.sampled_from(NUMBERS))
        lo, hi = bounds(path)
        value = draw(BEYOND.filter(lambda v: not lo <= v <= hi))
        _set(spec, path, value)
    if draw(st.booleans()):
        spec["overrides"] = []
    if draw(st.integers(0, 3)):
        consistent(spec)
    return spec


def consistent(spec: Json) -> None:
    """Mend the clashes between fields that the refusal rules catch (most examples should
    reach the analyses): vout below vin, the trip at or above the rating, the warning line
    above ambient, a loss table in increasing current. Edge values stay where they are."""
    if spec["vout_v"] >= spec["vin_v"]:
        spec["vin_v"], spec["vout_v"] = spec["vout_v"], spec["vin_v"]
        if spec["vout_v"] == spec["vin_v"]:
            spec["vout_v"] = spec["vin_v"] / 2
    phase = spec["phase"]
    phase["overcurrent_limit_a"] = max(phase["overcurrent_limit_a"], phase["rated_current_a"])
    margin = min(phase["warning_margin_k"], 300.0)
    phase["warning_margin_k"] = margin
    if phase["junction_limit_c"] - margin <= spec["ambient_c"]:
        spec["ambient_c"] = max(-100.0, phase["junction_limit_c"] - margin - 1.0)
    if phase["junction_limit_c"] - margin <= spec["ambient_c"]:
        phase["junction_limit_c"] = spec["ambient_c"] + margin + 1.0
    for override in spec["overrides"]:
        table = override["loss_table"]
        if any(b <= a for a, b in itertools.pairwise(table["current_a"])):
            table["current_a"] = [0.0, 20.0, 40.0]


def _ok(answer: httpx.Response) -> None:
    assert answer.status_code < 500, (answer.request.url, answer.text)


@EXAMPLES
@given(spec=definitions(), load_fraction=st.sampled_from([0.0, 0.5, 1.0, 1.5]))
async def test_no_analysis_of_a_stored_definition_answers_5xx(
    client: httpx.AsyncClient, spec: Json, load_fraction: float
) -> None:
    created = await client.post("/v1/rails", json=spec)
    _ok(created)
    if created.status_code != 201:
        assert created.status_code == 422, created.text
        assert created.json()["field"], created.text
        return
    rail = f"/v1/rails/{spec['id']}"
    rated = min(spec["phase"]["rated_current_a"], 1e4)
    limit = spec["phase"]["junction_limit_c"]
    now = time.time()
    body = [
        {
            "time": now - 10 + k, "seq": k, "vin_v": spec["vin_v"], "vout_v": spec["vout_v"],
            "phases": [
                {"index": i, "current_a": load_fraction * rated,
                 "temp_c": spec["ambient_c"] + (limit - spec["ambient_c"]) * k / 3}
                for i in range(spec["phase_count"])
            ],
        }
        for k in range(3)
    ]  # fmt: skip
    _ok(await client.post(f"{rail}/samples", json=body))
    steps = [{"at_s": 0.0, "current_a": spec["load_a"]}, {"at_s": 60.0, "current_a": 1e4}]
    breaker = {
        "vin_v": min(spec["vin_v"], 1000.0),
        "current_limit_a": min(spec["phase"]["overcurrent_limit_a"], 1e4),
        "delay_s": 1e-3,
        "foster": spec["phase"]["thermal"],
        "junction_limit_c": min(limit, 1000.0),
        "soa": [{"time_s": 1e-3, "current_a": 50.0}],
    }
    for method, url, options in [
        ("GET", f"{rail}/status", {}),
        ("GET", f"{rail}/screening", {"params": {"depth": 1}}),
        ("GET", f"{rail}/screening", {"params": {"depth": 2}}),
        ("POST", f"{rail}/forecast", {"json": {}}),
        ("POST", f"{rail}/forecast", {"json": {
            "drop": [{"phase": 0, "at_s": 5.0}], "horizon_s": 600.0, "load": {"steps": steps}
        }}),
        ("POST", f"{rail}/forecast", {"json": {  # ramps up and down
            "horizon_s": 600.0, "load": {"points": [*steps, {"at_s": 300.0, "current_a": 0.0}]}
        }}),
        ("GET", f"{rail}/ratings", {"params": {"pairs": True}}),
        ("GET", f"{rail}/reliability", {"params": {"hours": 1e4}}),
        ("POST", "/v1/tools/breaker-stress", {"json": breaker}),
    ]:  # fmt: skip
        _ok(await client.request(method, url, **options))
