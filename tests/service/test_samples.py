"""Telemetry ingest: formats, resends, late samples, and bad input that changes nothing."""

from __future__ import annotations

import json
from typing import Any

import anyio
import httpx
import pytest
from tests.factories import SMALL_RAIL, sample

pytestmark = pytest.mark.anyio
EVEN = [20.0, 20.0, 20.0, 20.0]


@pytest.fixture
async def rail(client: httpx.AsyncClient) -> str:
    answer = await client.post("/v1/rails", json=SMALL_RAIL)
    assert answer.status_code == 201, answer.text
    return "/v1/rails/bench-a"


async def stored(client: httpx.AsyncClient) -> list[int]:
    window = await client.get(
        "/v1/rails/bench-a/samples", params={"since": 0, "until": 1e10, "limit": 1000}
    )
    assert window.status_code == 200, window.text
    seqs: list[int] = window.json()["seq"]
    return seqs


async def post(client: httpx.AsyncClient, rail: str, body: Any, **kw: Any) -> httpx.Response:
    return await client.post(f"{rail}/samples", json=body, **kw)


async def test_one_sample_array_and_ndjson(client: httpx.AsyncClient, rail: str) -> None:
    one = await post(client, rail, sample(0, EVEN))
    assert one.status_code == 200, one.text
    assert one.json()["stored"] == 1
    assert one.json()["condition"] == "nominal"
    many = await post(client, rail, [sample(1, EVEN), sample(2, EVEN)])
    assert many.json()["stored"] == 2
    lines = "\n".join(json.dumps(sample(k, EVEN)) for k in (3, 4)) + "\n"
    nd = await client.post(
        f"{rail}/samples", content=lines, headers={"content-type": "application/x-ndjson"}
    )
    assert nd.status_code == 200, nd.text
    assert nd.json()["stored"] == 2
    assert await stored(client) == [0, 1, 2, 3, 4]


async def test_rfc3339_time_and_per_phase_values_round_trip(
    client: httpx.AsyncClient, rail: str
) -> None:
    body = sample(0, [19.0, 20.0, 21.0, 20.5])
    body["time"] = "2027-01-15T08:30:00+01:00"
    assert (await post(client, rail, body)).status_code == 200
    window = (await client.get(f"{rail}/samples", params={"since": 0, "until": 1e10})).json()
    # 2027-01-01T00:00Z is epoch 1798761600; plus 14 days and 7.5 h (07:30 UTC) by hand.
    assert window["time_s"] == [1798761600.0 + 14 * 86400 + 7.5 * 3600]
    assert window["current_a"] == [[19.0, 20.0, 21.0, 20.5]]


async def test_resend_is_absorbed(client: httpx.AsyncClient, rail: str) -> None:
    await post(client, rail, [sample(0, EVEN), sample(1, EVEN)])
    again = await post(client, rail, [sample(1, EVEN), sample(2, EVEN)])
    assert again.status_code == 200
    assert again.json() | {"condition": None} == {
        "stored": 1, "duplicates": 1, "late": 0, "rejected": [], "condition": None, "version": 1,
        "waiting": 0,
    }  # fmt: skip
    assert await stored(client) == [0, 1, 2]


async def test_same_seq_other_content_conflicts(client: httpx.AsyncClient, rail: str) -> None:
    await post(client, rail, sample(0, EVEN))
    clash = await post(client, rail, [sample(1, EVEN), sample(0, [1.0, 1.0, 1.0, 1.0])])
    assert clash.status_code == 409
    assert clash.json()["field"] == "[1].seq"
    assert await stored(client) == [0]


async def test_late_sample_is_stored_but_does_not_roll_back(
    client: httpx.AsyncClient, rail: str
) -> None:
    await post(client, rail, [sample(10, EVEN), sample(11, EVEN)])
    late = await post(client, rail, sample(5, [0.0, 0.0, 0.0, 0.0]))
    assert late.json()["late"] == 1
    status = (await client.get(f"{rail}/status")).json()
    assert status["last_sample"]["seq"] == 11
    assert all(p["condition"] == "active" for p in status["phases"])
    assert sorted(await stored(client)) == [5, 10, 11]


async def test_sense_voltage_and_read_iout_become_amps(
    client: httpx.AsyncClient, rail: str
) -> None:
    body = sample(0, EVEN)
    # DCR 0.3 mOhm at 20 degC; at 60 degC copper is 1 + 0.00393 * 40 = 1.1572 times that.
    body["phases"][1] = {"index": 1, "sense_v": 20.0 * 0.3e-3 * 1.1572, "temp_c": 60.0}
    # LINEAR11: N = -3 (11101b), Y = 160 -> 160 / 8 = 20 A; word = 0xE8A0.
    body["phases"][2] = {"index": 2, "read_iout": 0xE8A0, "temp_c": 60.0}
    assert (await post(client, rail, body)).status_code == 200
    window = (await client.get(f"{rail}/samples", params={"since": 0, "until": 1e10})).json()
    assert window["current_a"][0] == pytest.approx([20.0, 20.0, 20.0, 20.0], rel=1e-9)


async def test_window_gives_null_for_readings_not_reported(
    client: httpx.AsyncClient, rail: str
) -> None:
    full = sample(0, EVEN, iout_a=80.0)
    gaps = sample(1, EVEN)
    del gaps["phases"][1]["temp_c"]
    gaps["phases"] = gaps["phases"][:3]  # phase 3 sent nothing
    assert (await post(client, rail, [full, gaps])).status_code == 200
    window = (await client.get(f"{rail}/samples", params={"since": 0, "until": 1e10})).json()
    assert window["current_a"] == [[20.0, 20.0, 20.0, 20.0], [20.0, 20.0, 20.0, None]]
    assert window["temp_c"] == [[60.0, 60.0, 60.0, 60.0], [60.0, None, 60.0, None]]
    assert window["iout_a"] == [80.0, None]
    assert window["ambient_c"] == [None, None]
    empty = (await client.get(f"{rail}/samples", params={"since": 0, "until": 1})).json()
    assert (empty["count"], empty["current_a"], empty["temp_c"]) == (0, [], [])


TWO_CURRENTS = [{"index": 0, "current_a": 1.0, "sense_v": 0.01}]
BAD: list[tuple[str, Any, int, str]] = [
    ("missing field", {k: v for k, v in sample(9, EVEN).items() if k != "vin_v"}, 422, "[0].vin_v"),
    ("wrong type", sample(9, EVEN, vout_v="one"), 422, "[0].vout_v"),
    ("naive time", sample(9, EVEN) | {"time": "2027-01-15T08:30:00"}, 422, "[0].time"),
    ("two currents", sample(9, EVEN) | {"phases": TWO_CURRENTS}, 422, "[0].phases[0]"),
    ("phase out of range", sample(9, [*EVEN, 20.0]), 422, "[0].phases[4].index"),
    ("phase twice", sample(9, EVEN) | {"phases": [{"index": 1, "current_a": 1.0}] * 2}, 422,
     "[0].phases[1].index"),
    ("duplicate seq in batch", [sample(9, EVEN), sample(9, EVEN)], 422, "[1].seq"),
]  # fmt: skip


@pytest.mark.parametrize(("case", "body", "code", "field"), BAD, ids=[b[0] for b in BAD])
async def test_bad_input_changes_nothing(
    client: httpx.AsyncClient, rail: str, case: str, body: Any, code: int, field: str
) -> None:
    await post(client, rail, [sample(0, EVEN), sample(1, EVEN)])
    before = (await client.get(f"{rail}/status")).json()
    answer = await post(client, rail, [sample(2, EVEN), body] if isinstance(body, dict) else body)
    assert answer.status_code == code, answer.text
    shown = answer.json()["field"]
    assert shown == (field.replace("[0]", "[1]", 1) if isinstance(body, dict) else field)
    assert answer.json()["detail"]
    assert await stored(client) == [0, 1]
    after = (await client.get(f"{rail}/status")).json()
    assert after["last_sample"] == before["last_sample"] | {"age_s": after["last_sample"]["age_s"]}


@pytest.mark.parametrize("token", ["NaN", "Infinity"])
async def test_non_finite_reading_is_refused(
    client: httpx.AsyncClient, rail: str, token: str
) -> None:
    text = json.dumps(sample(0, EVEN)).replace('"current_a": 20.0', f'"current_a": {token}', 1)
    answer = await client.post(
        f"{rail}/samples", content=text, headers={"content-type": "application/json"}
    )
    assert answer.status_code == 422
    assert answer.json()["field"] == "[0].phases[0].current_a"
    assert await stored(client) == []


async def test_unknown_rail(client: httpx.AsyncClient) -> None:
    answer = await client.post("/v1/rails/nope/samples", json=sample(0, EVEN))
    assert answer.status_code == 404
    assert answer.json()["field"] == "rail_id"


async def test_batch_over_the_limit_is_413(client: httpx.AsyncClient, rail: str) -> None:
    answer = await post(client, rail, [sample(k, EVEN) for k in range(51)])
    assert answer.status_code == 413
    assert "50" in answer.json()["detail"]
    assert await stored(client) == []


async def test_body_over_the_limit_is_413(client: httpx.AsyncClient, rail: str) -> None:
    answer = await client.post(
        f"{rail}/samples", content=b"[" + b" " * 70_000 + b"]",
        headers={"content-type": "application/json"},
    )  # fmt: skip
    assert answer.status_code == 413


async def test_malformed_ndjson_line_names_the_line(client: httpx.AsyncClient, rail: str) -> None:
    lines = json.dumps(sample(0, EVEN)) + "\n{not json\n" + json.dumps(sample(2, EVEN)) + "\n"
    answer = await client.post(
        f"{rail}/samples", content=lines, headers={"content-type": "application/x-ndjson"}
    )
    assert answer.status_code == 400
    assert answer.json()["field"] == "line 2"
    assert await stored(client) == []


async def test_rejected_batch_leaves_an_event(client: httpx.AsyncClient, rail: str) -> None:
    await post(client, rail, [sample(0, EVEN), sample(0, EVEN)])
    page = (await client.get(f"{rail}/events", params={"kind": "telemetry.rejected"})).json()
    assert len(page["items"]) == 1
    assert page["items"][0]["details"]["field"] == "[1].seq"


async def test_a_window_across_versions_with_different_phase_counts(
    client: httpx.AsyncClient,
) -> None:
    """Issue 17 item 6: after a PUT from 4 to 6 phases the window answers each sample under
    its own version, phases aligned by index (no values shifted between phases), history
    answers, and a rehearsal over the window is refused before a job exists."""
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    before = [sample(k, [10.0, 11.0, 12.0, 13.0]) for k in range(3)]
    assert (await client.post("/v1/rails/bench-a/samples", json=before)).status_code == 200
    six = {k: v for k, v in SMALL_RAIL.items() if k != "id"} | {"phase_count": 6}
    assert (await client.put("/v1/rails/bench-a", json=six)).status_code == 200
    after = [sample(k, [20.0, 21.0, 22.0, 23.0, 24.0, 25.0]) for k in range(3, 6)]
    assert (await client.post("/v1/rails/bench-a/samples", json=after)).status_code == 200
    window = {"since": 0, "until": 1e10}
    answer = await client.get("/v1/rails/bench-a/samples", params=window)
    assert answer.status_code == 200, answer.text
    got = answer.json()
    assert got["version"] == [1, 1, 1, 2, 2, 2]
    assert got["phase_count"] == [4, 4, 4, 6, 6, 6]
    assert got["current_a"][0] == [10.0, 11.0, 12.0, 13.0, None, None]
    assert got["current_a"][5] == [20.0, 21.0, 22.0, 23.0, 24.0, 25.0]
    assert got["flags"][0][4:] == [0, 0]
    history = await client.get("/v1/rails/bench-a/history", params=window)
    assert history.status_code == 200, history.text
    rehearsal = {"trace": {"rail_id": "bench-a"} | window, "settings": {"oc_level_a": 30.0}}
    refused = await client.post("/v1/rehearsals", json=rehearsal)
    assert (refused.status_code, refused.json()["field"]) == (422, "trace"), refused.text
    assert "spans definition versions 1, 2 with different phase counts" in refused.json()["detail"]
    assert (await client.get("/v1/rehearsals/1")).status_code == 404  # no job was made
    rehearsal["trace"]["since"] = 1.8e9 + 3  # the second version's part alone replays
    job = (await client.post("/v1/rehearsals", json=rehearsal)).json()
    for _ in range(200):
        state = (await client.get(f"/v1/rehearsals/{job['id']}")).json()
        if state["status"] in ("done", "failed"):
            break
        await anyio.sleep(0.05)
    assert state["status"] == "done", state


async def test_input_current_and_pmbus_words_are_decoded_and_stored(
    client: httpx.AsyncClient, rail: str
) -> None:
    """READ_VIN 0xD300 = 12.0 V, READ_VOUT 0x0200 with VOUT_MODE 0x17 = 1.0 V, READ_IIN 0xC8C0 =
    1.5 A, READ_TEMPERATURE_1 0xE2A4 = 42.25 degC (worked by hand in
    tests/reference/test_ref_pmbus_telemetry.py); the rail in this module has no vout_mode."""
    body = sample(0, [20.0] * 4, iin_a=6.9)
    assert (await client.post(f"{rail}/samples", json=body)).status_code == 200
    words = sample(1, [20.0] * 4)
    del words["vin_v"]
    for reading in words["phases"]:
        reading |= {"read_vin": 0xD300, "read_iin": 0xC8C0}
        del reading["temp_c"]
        reading["read_temperature_1"] = 0xE2A4
    assert (await client.post(f"{rail}/samples", json=words)).status_code == 200
    window = (await client.get(f"{rail}/samples", params={"since": 0, "until": 2e9})).json()
    assert window["iin_a"] == [6.9, 6.0]
    assert window["vin_v"] == [12.0, 12.0]
    assert window["temp_c"][1] == [42.25] * 4
    vout_word = sample(2, [20.0] * 4)
    vout_word["phases"][0]["read_vout"] = 0x0200
    refused = await client.post(f"{rail}/samples", json=vout_word)
    assert refused.status_code == 422
    assert refused.json()["field"] == "[0].phases[0].read_vout"
    assert await stored(client) == [0, 1]
