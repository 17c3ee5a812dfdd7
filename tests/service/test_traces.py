"""Trace uploads: CSV and samples, and refusals that name the line or field."""

from __future__ import annotations

import json

import httpx
import pytest
from tests.factories import sample

pytestmark = pytest.mark.anyio
CSV = (
    "time_s,vin_v,i0_a,i1_a,t0_c,t1_c\n0,12,10,10.5,40,\n0.5,12,11,10,41,42\n1.0,11.9,0,21,41,45\n"
)


async def test_csv_upload(client: httpx.AsyncClient) -> None:
    answer = await client.post(
        "/v1/traces",
        params={"name": "bench run 7"},
        content=CSV,
        headers={"content-type": "text/csv"},
    )
    assert answer.status_code == 201, answer.text
    body = answer.json()
    assert (body["n_samples"], body["n_phases"], body["end_s"]) == (3, 2, 1.0)
    assert (await client.get(f"/v1/traces/{body['id']}")).json() == body


async def test_ndjson_upload(client: httpx.AsyncClient) -> None:
    lines = "\n".join(json.dumps(sample(k, [20.0, 21.0, 19.0])) for k in range(4))
    answer = await client.post(
        "/v1/traces", content=lines, headers={"content-type": "application/x-ndjson"}
    )
    assert answer.status_code == 201, answer.text
    assert answer.json()["n_phases"] == 3


@pytest.mark.parametrize(
    ("text", "field"),
    [
        ("time,vin_v,i0_a\n0,12,1\n1,12,1\n", "header"),
        ("time_s,vin_v,i1_a\n0,12,1\n1,12,1\n", "header"),
        ("time_s,vin_v,i0_a\n0,12,1\n1,12,x\n", "line 3"),
        ("time_s,vin_v,i0_a\n0,12,1\n1,12\n", "line 3"),
        ("time_s,vin_v,i0_a\n0,12,1\n0,12,1\n", "[1].time"),
        ("time_s,vin_v,i0_a\n0,12,nan\n1,12,1\n", "line 2"),
    ],
)
async def test_bad_csv(client: httpx.AsyncClient, text: str, field: str) -> None:
    answer = await client.post("/v1/traces", content=text, headers={"content-type": "text/csv"})
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field


async def test_sense_voltage_needs_a_rail(client: httpx.AsyncClient) -> None:
    body = [sample(k, [20.0, 20.0]) for k in range(3)]
    body[1]["phases"][0] = {"index": 0, "sense_v": 0.006}
    answer = await client.post("/v1/traces", json=body)
    assert answer.status_code == 422
    assert answer.json()["field"] == "[1].phases[0].sense_v"


async def test_csv_robustness(client: httpx.AsyncClient) -> None:
    """A byte-order mark, blank lines, nan and empty readings, columns in any order and no
    vin_v column are all accepted (issue 18)."""
    text = "\ufeffi0_a,time_s,t0_c,iso0\r\n10,0,NaN,\r\n\r\n11,0.5,41,0\r\n0,1.0,nan,1\r\n\r\n\r\n"
    answer = await client.post(
        "/v1/traces", content=text.encode("utf-8"), headers={"content-type": "text/csv"}
    )
    assert answer.status_code == 201, answer.text
    assert (answer.json()["n_samples"], answer.json()["n_phases"]) == (3, 1)


@pytest.mark.parametrize(
    ("text", "field", "cause"),
    [
        ("time_s,i0_a\n0,1\n1,nan\n", "line 3", "a reading is required here"),
        ("time_s,i0_a\n0,\n1,1\n", "line 2", "a reading is required here"),
        ("time_s,i0_a,volts\n0,1,1\n1,1,1\n", "header", "unknown column 'volts'"),
        ("time_s,i0_a,t1_c\n0,1,1\n1,1,1\n", "header", "names no phase"),
        ("time_s,i0_a,iso0\n0,1,2\n1,1,1\n", "header", "iso{k} cells must be 0, 1"),
        ("i0_a,vin_v\n1,12\n1,12\n", "header", "needs time_s"),
        ("time_s,i0_a\n0,1\n1,inf\n", "line 3", "not finite"),
    ],
)
async def test_csv_refusals_say_why(
    client: httpx.AsyncClient, text: str, field: str, cause: str
) -> None:
    answer = await client.post("/v1/traces", content=text, headers={"content-type": "text/csv"})
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
    assert cause in answer.json()["detail"]


async def test_text_plain_is_told_apart_by_content(client: httpx.AsyncClient) -> None:
    as_csv = await client.post("/v1/traces", content=CSV, headers={"content-type": "text/plain"})
    assert as_csv.status_code == 201, as_csv.text
    lines = "\n".join(json.dumps(sample(k, [20.0, 21.0])) for k in range(3))
    as_nd = await client.post("/v1/traces", content=lines, headers={"content-type": "text/plain"})
    assert (as_nd.status_code, as_nd.json()["n_phases"]) == (201, 2)
    latin = await client.post(
        "/v1/traces", content=CSV.replace("vin_v", "vin_\xb5").encode("latin-1"),
        headers={"content-type": "text/csv"},
    )  # fmt: skip
    assert (latin.status_code, latin.json()["field"]) == (422, "body")
