"""The bulk forms (columnar JSON and CSV) against the sample objects they stand for.

Equivalence: random telemetry (every way to give a current, temperatures, flags, status words,
times as numbers or RFC 3339, phases left out) posted in the same batches as objects, as
columns and as CSV stores the same samples, raises the same events and leaves the same live
state. Refusal: one bad cell of any kind among good ones is refused whole with a 422 naming
that cell, and nothing is stored.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import json
from typing import Any

import httpx
import numpy as np
import pytest
from fastapi import FastAPI
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from phaseward_client.columns import to_columns, to_csv
from tests.service.test_ingest_properties import T0, new_rail, telemetry

from phaseward.api.schemas.columns import PHASE_COLUMNS, SAMPLE_COLUMNS, Refusal, parse_columns
from phaseward.api.schemas.columns_csv import parse_csv
from phaseward.api.schemas.samples import SAMPLES, PhaseReading, SampleIn, to_incoming
from phaseward.errors import BadRequest, PayloadTooLarge
from phaseward.monitor.telemetry import IncomingSamples
from phaseward.store import state
from phaseward.store.db import transaction

pytestmark = pytest.mark.anyio
EXAMPLES = settings(
    max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
COLUMNS = "application/vnd.phaseward.columns+json"
Json = dict[str, Any]


async def post_as(
    client: httpx.AsyncClient, rail_id: str, form: str, items: list[Json]
) -> httpx.Response:
    path = f"/v1/rails/{rail_id}/samples"
    if form == "objects":
        return await client.post(path, json=items)
    columns = to_columns(items)
    assert columns is not None
    if form == "columns":
        return await client.post(
            path, content=json.dumps(columns), headers={"content-type": COLUMNS}
        )
    return await client.post(path, content=to_csv(columns), headers={"content-type": "text/csv"})


async def outcome(client: httpx.AsyncClient, app: FastAPI, rail_id: str) -> Json:
    """What a rail holds: stored samples, events, status and the live state (rail id and
    clock-dependent ages taken out)."""
    window = (
        await client.get(f"/v1/rails/{rail_id}/samples", params={"since": 0, "until": 1e11})
    ).json()
    events = (await client.get(f"/v1/rails/{rail_id}/events", params={"limit": 1000})).json()
    status = (await client.get(f"/v1/rails/{rail_id}/status")).json()
    with transaction(app.state.sessions) as session:
        row = state.get(session, rail_id)
        live = None if row is None else dict(row.state)
    drop = {"rail_id", "id", "age_s", "links", "href", "url"}
    return _without(
        {"window": window, "events": events["items"], "status": status, "live": live}, drop
    )


def _without(x: Any, drop: set[str]) -> Any:
    if isinstance(x, dict):
        return {k: _without(v, drop) for k, v in x.items() if k not in drop}
    if isinstance(x, list):
        return [_without(v, drop) for v in x]
    return x


@EXAMPLES
@given(case=telemetry())
async def test_objects_columns_and_csv_store_and_judge_alike(
    client: httpx.AsyncClient, app: FastAPI, case: tuple[int, int, list[Json], list[list[int]]]
) -> None:
    phase_count, debounce, samples, batches = case
    got = {}
    for form in ("objects", "columns", "csv"):
        rail_id = await new_rail(client, phase_count, debounce)
        answers = []
        for batch in batches:
            answer = await post_as(client, rail_id, form, [samples[s] for s in batch])
            assert answer.status_code == 200, (form, answer.text)
            answers.append(answer.json())
        got[form] = {"answers": answers, **await outcome(client, app, rail_id)}
    assert got["columns"] == got["objects"]
    assert got["csv"] == got["objects"]


PER_SAMPLE = ("seq", "t_s", "vin_v", "vout_v", "iout_a", "iin_a", "ambient_c")


@settings(max_examples=300, deadline=None)
@given(case=telemetry())
def test_objects_and_columns_give_the_same_arrays(
    case: tuple[int, int, list[Json], list[list[int]]],
) -> None:
    """The two readers the monitor is fed by (sample objects through the schema, columns
    through numpy) give the same long-form arrays, dtype and bit for bit, up to the order of
    the readings within a sample (objects keep the body's, columns the phase index's)."""
    samples = case[2]
    columns = to_columns(samples)
    assert columns is not None
    from_objects = to_incoming(SAMPLES.validate_python(samples))
    from_columns = parse_columns(json.dumps(columns).encode(), max_items=len(samples))
    mine_order = np.lexsort((from_objects.phase, from_objects.item))
    theirs_order = np.lexsort((from_columns.phase, from_columns.item))
    for field in dataclasses.fields(IncomingSamples):
        if field.name in ("cell", "slot"):  # how each names a bad cell: in its own body's terms
            continue
        mine, theirs = getattr(from_objects, field.name), getattr(from_columns, field.name)
        assert mine.dtype == theirs.dtype, field.name
        if field.name not in PER_SAMPLE:
            mine, theirs = mine[mine_order], theirs[theirs_order]
        np.testing.assert_array_equal(mine, theirs, err_msg=field.name)
    positions = [j for sample in samples for j in range(len(sample["phases"]))]
    np.testing.assert_array_equal(from_objects.slot, positions)


def test_the_columns_are_the_sample_objects_fields() -> None:
    """One vocabulary: a columnar field is a field of a sample or of a phase reading."""
    assert {c.name for c in SAMPLE_COLUMNS} == set(SampleIn.model_fields) - {"phases"}
    assert {c.name for c in PHASE_COLUMNS} == set(PhaseReading.model_fields) - {"index"}


def _bounds(prop: Json) -> tuple[float, float] | None:
    """(minimum, maximum) of a JSON-schema property, through a nullable anyOf."""
    for option in [prop, *prop.get("anyOf", [])]:
        if "minimum" in option:
            return option["minimum"], option["maximum"]
    return None


def test_the_columns_take_the_sample_objects_bounds() -> None:
    """Bounds are named once; this catches a field of the objects given a bound of its own."""
    doc = SampleIn.model_json_schema()
    objects = {("sample", k): _bounds(v) for k, v in doc["properties"].items()}
    objects |= {
        ("phase", k): _bounds(v) for k, v in doc["$defs"]["PhaseReading"]["properties"].items()
    }
    for where, columns in (("sample", SAMPLE_COLUMNS), ("phase", PHASE_COLUMNS)):
        for column in columns:
            assert objects[(where, column.name)] == column.bounds, column.name


# ---------------------------------------------------------------- refusals


def good_columns(n: int, first_seq: int = 10) -> Json:
    return {
        "seq": list(range(first_seq, first_seq + n)),
        "time": [T0 + first_seq + k for k in range(n)],
        "vin_v": [12.0] * n,
        "vout_v": [1.0] * n,
        "phases": {"current_a": [[20.0] * 4 for _ in range(n)], "temp_c": [[60.0] * 4] * n},
    }


@st.composite
def spoiled(draw: st.DrawFn) -> tuple[Json | str, str, str]:
    """A columnar body with one bad cell; the JSON text (a str when it carries a NaN or
    Infinity token), the field the JSON answer names and the one the CSV answer names."""
    n = draw(st.integers(1, 5))
    body = good_columns(n)
    k, j = draw(st.integers(0, n - 1)), draw(st.integers(0, 3))
    phases = body["phases"]
    what = draw(
        st.sampled_from([
            "wrong type", "wrong phase type", "non-finite", "below absolute zero",
            "negative voltage", "word too large", "seq too large", "negative seq", "naive time",
            "milliseconds", "no current", "two currents", "two temperatures", "seq twice",
            "phase out of range", "cold winding", "flag not boolean",
        ])
    )  # fmt: skip
    cell, csv_cell = f"phases.current_a[{k}][{j}]", f"[{k}].current_a[{j}]"
    if what == "wrong type":
        name = draw(st.sampled_from(["vin_v", "vout_v", "seq", "time"]))
        body[name][k] = draw(st.sampled_from(["twelve", [1.0], {"v": 1.0}, None, True]))
        if name == "time" and isinstance(body[name][k], str):
            body[name][k] = "twelve o'clock"
        return body, f"{name}[{k}]", f"[{k}].{name}"
    if what == "wrong phase type":
        phases["current_a"][k][j] = draw(st.sampled_from(["twenty", True, [1.0]]))
        return body, cell, csv_cell
    if what == "non-finite":
        phases["current_a"][k][j] = "@@"
        token = draw(st.sampled_from(["NaN", "Infinity", "-Infinity", "1e999"]))
        return json.dumps(body).replace('"@@"', token), cell, csv_cell
    if what == "below absolute zero":
        phases["temp_c"] = [[60.0] * 4 for _ in range(n)]
        phases["temp_c"][k][j] = draw(st.floats(-1e6, -273.16))
        return body, f"phases.temp_c[{k}][{j}]", f"[{k}].temp_c[{j}]"
    if what == "negative voltage":
        name = draw(st.sampled_from(["vin_v", "vout_v"]))
        body[name][k] = draw(st.floats(-1e6, -1e-9))
        return body, f"{name}[{k}]", f"[{k}].{name}"
    if what == "word too large":
        phases["read_iout"] = [[None] * 4 for _ in range(n)]
        phases["read_iout"][k][j] = draw(st.integers(0x10000, 2**70))
        phases["current_a"][k][j] = None
        return body, f"phases.read_iout[{k}][{j}]", f"[{k}].read_iout[{j}]"
    if what == "seq too large":
        body["seq"][k] = draw(st.integers(2**62 + 1, 2**70))
        return body, f"seq[{k}]", f"[{k}].seq"
    if what == "negative seq":
        body["seq"][k] = draw(st.integers(-(2**40), -1))
        return body, f"seq[{k}]", f"[{k}].seq"
    if what == "naive time":
        body["time"][k] = "2027-01-15T08:30:00"
        return body, f"time[{k}]", f"[{k}].time"
    if what == "milliseconds":
        body["time"][k] *= 1000.0
        return body, f"time[{k}]", f"[{k}].time"
    if what == "no current":
        phases["current_a"][k][j] = None  # the temperature alone is a reading without a current
        return body, f"phases[{k}][{j}]", f"[{k}].phase[{j}]"
    if what == "two currents":
        phases["sense_v"] = [[None] * 4 for _ in range(n)]
        phases["sense_v"][k][j] = 0.004
        return body, f"phases[{k}][{j}]", f"[{k}].phase[{j}]"
    if what == "two temperatures":
        phases["read_temperature_1"] = [[None] * 4 for _ in range(n)]
        phases["read_temperature_1"][k][j] = 0xE3C0
        return body, f"phases[{k}][{j}]", f"[{k}].phase[{j}]"
    if what == "seq twice":
        if n == 1:
            body = good_columns(2)
            k = 1
        k = max(k, 1)
        body["seq"][k] = body["seq"][k - 1]
        return body, f"seq[{k}]", f"[{k}].seq"
    if what == "phase out of range":  # the rail has 4 phases: the monitor refuses index 4+
        phases["index"] = [0, 1, 2, 3]
        phases["index"][j] = draw(st.integers(4, 63))
        if len(set(phases["index"])) < 4:
            phases["index"][j] = 63
        return body, f"phases.index[{j}]", f"[0].phase[{phases['index'][j]}]"
    if what == "cold winding":
        phases["sense_v"] = [[None] * 4 for _ in range(n)]
        phases["sense_v"][k][j] = 0.006
        phases["current_a"][k][j] = None
        phases["temp_c"] = [[60.0] * 4 for _ in range(n)]
        phases["temp_c"][k][j] = draw(st.floats(-273.15, -234.5))
        return body, f"phases.temp_c[{k}][{j}]", f"[{k}].temp_c[{j}]"
    phases["breaker_tripped"] = [[False] * 4 for _ in range(n)]
    phases["breaker_tripped"][k][j] = draw(st.sampled_from([1, "yes", 0.5]))
    return body, f"phases.breaker_tripped[{k}][{j}]", f"[{k}].breaker_tripped[{j}]"


async def assert_refused(
    client: httpx.AsyncClient, rail_id: str, content: str, content_type: str, field: str
) -> None:
    before = (await client.get(f"/v1/rails/{rail_id}/status")).json()
    answer = await client.post(
        f"/v1/rails/{rail_id}/samples", content=content, headers={"content-type": content_type}
    )
    assert answer.status_code == 422, answer.text
    got = answer.json()
    assert (got["error"], got["field"]) == ("invalid_input", field), got
    assert got["detail"]
    window = (
        await client.get(f"/v1/rails/{rail_id}/samples", params={"since": 0, "until": 1e11})
    ).json()
    assert window["seq"] == [0, 1]
    after = (await client.get(f"/v1/rails/{rail_id}/status")).json()
    assert after["condition"] == before["condition"]
    assert after["last_sample"]["seq"] == before["last_sample"]["seq"]
    events = (await client.get(f"/v1/rails/{rail_id}/events", params={"limit": 1000})).json()
    refusals = [e for e in events["items"] if e["kind"] == "telemetry.rejected"]
    assert refusals[0]["details"]["last"]["field"] == field


@EXAMPLES
@given(case=spoiled())
async def test_a_bad_cell_is_refused_by_name_and_nothing_is_stored(
    client: httpx.AsyncClient, case: tuple[Json | str, str, str]
) -> None:
    body, field, csv_field = case
    text = body if isinstance(body, str) else json.dumps(body)
    rail_id = await new_rail(client, 4, 2)
    first = await client.post(
        f"/v1/rails/{rail_id}/samples",
        content=json.dumps(good_columns(2, first_seq=0)),
        headers={"content-type": COLUMNS},
    )
    assert first.status_code == 200, first.text
    await assert_refused(client, rail_id, text, COLUMNS, field)
    if isinstance(body, dict) and _fits_csv(body):
        await assert_refused(client, rail_id, to_csv(body), "text/csv", csv_field)


def _fits_csv(body: Json) -> bool:
    """CSV cells are text: a list, an object, or a boolean outside a flag column has no CSV
    form (and a flag that is no boolean may read as one in CSV)."""
    flags = {"breaker_tripped", "driver_disabled", "overcurrent", "overtemperature"}
    cells = [v for k, col in body.items() if k != "phases" for v in col]
    cells += [
        v for k, m in body["phases"].items() if k not in flags | {"index"} for row in m for v in row
    ]
    flagged = [v for k in flags for row in body["phases"].get(k, []) for v in row]
    return all(type(v) in (int, float, str, type(None)) for v in cells) and all(
        type(v) in (bool, type(None)) for v in flagged
    )


CSV_GOOD = "seq,time,vin_v,vout_v,current_a[0],current_a[1],temp_c[0],temp_c[1]\n"


@pytest.mark.parametrize(
    ("rows", "field"),
    [
        ("10,1800000010,12,1,20,20,60,60,7\n", "[0]"),  # a cell more than the header
        ("10,1800000010,12,1,20,20,nan,60\n", "[0].temp_c[0]"),
        ("10,1800000010,12,1,20,20,60,60\n11,1800000011,12,1,20,x,60,60\n", "[1].current_a[1]"),
        ("10,1800000010,12,1,20,20,60,60\n11,,12,1,20,20,60,60\n", "[1].time"),
        ("10,1800000010,12,1,,20,60,60\n", "[0].phase[0]"),
    ],
)
async def test_csv_cells_are_refused_by_row_and_header(
    client: httpx.AsyncClient, rows: str, field: str
) -> None:
    rail_id = await new_rail(client, 2, 2)
    answer = await client.post(
        f"/v1/rails/{rail_id}/samples",
        content=CSV_GOOD + rows,
        headers={"content-type": "text/csv"},
    )
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
    window = (
        await client.get(f"/v1/rails/{rail_id}/samples", params={"since": 0, "until": 1e11})
    ).json()
    assert window["seq"] == []


@pytest.mark.parametrize(
    ("header", "field"),
    [("colour", "colour"), ("current_a[64]", "current_a[64]"), ("vin_v", "vin_v")],
)
async def test_csv_headers_are_refused_by_name(
    client: httpx.AsyncClient, header: str, field: str
) -> None:
    """An unknown column, a phase beyond 63, a column given twice."""
    rail_id = await new_rail(client, 2, 2)
    body = CSV_GOOD.rstrip("\n") + f",{header}\n10,1800000010,12,1,20,20,60,60,1\n"
    answer = await client.post(
        f"/v1/rails/{rail_id}/samples", content=body, headers={"content-type": "text/csv"}
    )
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field


async def test_bulk_bodies_keep_the_sample_limit_and_other_media_are_refused(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    rail_id = await new_rail(client, 4, 2)
    limit = app.state.settings.max_batch_samples
    big = good_columns(limit + 1)
    answer = await client.post(
        f"/v1/rails/{rail_id}/samples", content=json.dumps(big), headers={"content-type": COLUMNS}
    )
    assert answer.status_code == 413, answer.text
    answer = await client.post(
        f"/v1/rails/{rail_id}/samples", content="seq\n1\n", headers={"content-type": "text/plain"}
    )
    assert answer.status_code == 415, answer.text
    assert answer.json()["field"] == "content-type"


_JSON = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=8),
    lambda inner: (
        st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4)
    ),
    max_leaves=30,
)
_NEAR = st.fixed_dictionaries(
    {"seq": st.lists(st.integers(-2, 2**63) | _JSON, min_size=1, max_size=3)},
    optional={
        "time": st.lists(st.floats() | st.text(max_size=30) | _JSON, max_size=3),
        "vin_v": _JSON,
        "phases": st.dictionaries(
            st.sampled_from(["index", "current_a", "temp_c", "read_iout", "breaker_tripped"]),
            st.lists(st.lists(_JSON, max_size=3) | _JSON, max_size=3),
        ),
    },
)


PER_SAMPLE = ("seq", "t_s", "vin_v", "vout_v", "iout_a", "iin_a", "ambient_c")


@settings(max_examples=300, deadline=None)
@given(doc=_NEAR | _JSON)
def test_any_json_is_taken_or_refused_by_name_never_a_crash(doc: Any) -> None:
    """Near-miss and arbitrary documents: a columnar body, or a 4xx naming a field (an
    unknown key is named as sent, even the empty one)."""
    field: str | None = None
    try:
        incoming = parse_columns(json.dumps(doc).encode(), max_items=100)
    except Refusal as refused:
        field = refused.error.field
    except (BadRequest, PayloadTooLarge) as err:
        field = err.field
    else:
        assert incoming.n == len(doc["seq"])
        return
    assert field is not None


_CSV_CELL = st.sampled_from(
    ["", "0", "1", "-1", "1e999", "nan", "x", "12.5", "2027-01-15T08:30:00Z"]
)
_CSV_HEADER = st.sampled_from(["seq", "time", "vin_v", "current_a[0]", "temp_c[1]", "read_iout[0]"])


PER_SAMPLE = ("seq", "t_s", "vin_v", "vout_v", "iout_a", "iin_a", "ambient_c")


@settings(max_examples=300, deadline=None)
@given(
    header=st.lists(_CSV_HEADER | st.text(max_size=6), min_size=1, max_size=5),
    rows=st.lists(st.lists(_CSV_CELL, min_size=1, max_size=6), max_size=4),
)
def test_any_csv_is_taken_or_refused_by_name_never_a_crash(
    header: list[str], rows: list[list[str]]
) -> None:
    out = io.StringIO()
    csv.writer(out).writerows([header, *rows])
    field: str | None = None
    try:
        incoming = parse_csv(out.getvalue().encode(), max_items=100)
    except Refusal as refused:
        field = refused.error.field
    except (BadRequest, PayloadTooLarge) as err:
        field = err.field
    else:
        assert incoming.n == len(rows)
        return
    assert field is not None
