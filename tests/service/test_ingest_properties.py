"""Properties of the ingest path over random telemetry, checked against a model of the store.

Valid samples: any phase count, any of the three ways to give a current, temperatures or none,
fault flags and status words, samples posted in random batches, out of time order, with
resends. Never a 5xx; stored plus duplicates is the batch; a resend is absorbed; late samples
are stored but never move the live state back; what was posted is what is stored.

Invalid samples: one bad item (wrong type, NaN, a missing field, a bad phase index, ...) among
valid ones. A 4xx that names the bad item's field, and nothing stored.

Each example works on a rail of its own, so examples share one app (created per test function).
"""

from __future__ import annotations

import itertools
import json
from datetime import UTC, datetime
from typing import Any

import httpx
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from tests.factories import rail_spec, sample

pytestmark = pytest.mark.anyio
EXAMPLES = settings(
    max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
T0 = 1.8e9
RAIL_NUMBERS = itertools.count()
CONDITIONS = {"nominal", "exposed", "degraded", "overloaded", "down"}

Json = dict[str, Any]


async def new_rail(client: httpx.AsyncClient, phase_count: int, debounce: int) -> str:
    rail_id = f"prop-{next(RAIL_NUMBERS)}"
    spec = rail_spec(id=rail_id, phase_count=phase_count, monitor={"debounce_samples": debounce})
    answer = await client.post("/v1/rails", json=spec)
    assert answer.status_code == 201, answer.text
    return rail_id


async def post(client: httpx.AsyncClient, rail_id: str, items: list[Json]) -> httpx.Response:
    # Serialised here, not by httpx, so that NaN and Infinity can be sent as the bare tokens.
    return await client.post(
        f"/v1/rails/{rail_id}/samples",
        content=json.dumps(items),
        headers={"content-type": "application/json"},
    )


async def stored_seqs(client: httpx.AsyncClient, rail_id: str) -> list[int]:
    window = await client.get(
        f"/v1/rails/{rail_id}/samples", params={"since": 0, "until": 1e11, "limit": 1000}
    )
    assert window.status_code == 200, window.text
    seqs: list[int] = window.json()["seq"]
    return seqs


# ---------------------------------------------------------------- valid telemetry


@st.composite
def readings(draw: st.DrawFn, phase_count: int) -> list[Json]:
    """Readings of a random subset of the phases (at least one), in random order."""
    indexes = draw(
        st.lists(st.integers(0, phase_count - 1), min_size=1, max_size=phase_count, unique=True)
    )
    out = []
    for index in indexes:
        reading: Json = {"index": index}
        how = draw(st.sampled_from(["current_a", "sense_v", "read_iout"]))
        if how == "current_a":
            reading["current_a"] = draw(st.floats(-100.0, 150.0))
        elif how == "sense_v":
            reading["sense_v"] = draw(st.floats(-0.05, 0.05))
        else:  # a LINEAR11 word of a current a phase can carry, about -128..128 A
            exponent, mantissa = draw(st.integers(-8, -3)), draw(st.integers(-1024, 1023))
            reading["read_iout"] = (exponent & 0x1F) << 11 | mantissa & 0x7FF
        temp = draw(st.none() | st.floats(-55.0, 300.0))
        if temp is not None:
            reading["temp_c"] = temp
        for flag in ("breaker_tripped", "driver_disabled", "overcurrent", "overtemperature"):
            if draw(st.integers(0, 9)) == 0:  # flags are rare, as on a real rack
                reading[flag] = True
        if draw(st.integers(0, 9)) == 0:
            reading["status_word"] = draw(st.integers(0, 0xFFFF))
        out.append(reading)
    return out


@st.composite
def telemetry(draw: st.DrawFn) -> tuple[int, int, list[Json], list[list[int]]]:
    """A rail's phase count and debounce, its samples by seq (time increasing with seq), and
    the batches they are posted in: random subsets, out of order, overlapping (resends)."""
    phase_count = draw(st.integers(1, 6))
    debounce = draw(st.integers(1, 3))
    n = draw(st.integers(1, 24))
    gaps = draw(st.lists(st.floats(0.05, 30.0), min_size=n, max_size=n))
    samples: list[Json] = []
    t = T0
    for seq in range(n):
        t += gaps[seq]
        when: float | str = t
        if draw(st.booleans()):
            when = datetime.fromtimestamp(round(t, 3), tz=UTC).isoformat()
        item: Json = {
            "time": when,
            "seq": seq,
            "vin_v": draw(st.floats(0.0, 60.0)),
            "vout_v": draw(st.floats(0.0, 5.0)),
            "phases": draw(readings(phase_count)),
        }
        if draw(st.booleans()):
            item["ambient_c"] = draw(st.floats(-60.0, 150.0))
        if draw(st.booleans()):
            item["iout_a"] = draw(st.floats(-200.0, 600.0))
        samples.append(item)
    seqs = st.lists(st.integers(0, n - 1), min_size=1, max_size=n, unique=True)
    batches = draw(st.lists(seqs, min_size=1, max_size=6))
    return phase_count, debounce, samples, batches


@EXAMPLES
@given(case=telemetry())
async def test_valid_telemetry_is_stored_once_and_never_rolls_the_state_back(
    client: httpx.AsyncClient, case: tuple[int, int, list[Json], list[list[int]]]
) -> None:
    phase_count, debounce, samples, batches = case
    rail_id = await new_rail(client, phase_count, debounce)
    stored: set[int] = set()
    for batch in batches:
        answer = await post(client, rail_id, [samples[s] for s in batch])
        assert answer.status_code == 200, answer.text
        got = answer.json()
        fresh = [s for s in batch if s not in stored]
        newest = max(stored, default=-1)
        assert got["stored"] == len(fresh)
        assert got["duplicates"] == len(batch) - len(fresh)
        assert got["stored"] + got["duplicates"] == len(batch)
        assert got["late"] == sum(1 for s in fresh if s < newest)
        assert got["rejected"] == []
        stored.update(batch)
        status = await client.get(f"/v1/rails/{rail_id}/status")
        assert status.status_code == 200, status.text
        # Time grows with seq, so the live state is at the newest seq stored, never before.
        assert status.json()["last_sample"]["seq"] == max(stored)
        assert got["condition"] in CONDITIONS
        assert status.json()["condition"] == got["condition"]

    assert await stored_seqs(client, rail_id) == sorted(stored)
    window = (
        await client.get(f"/v1/rails/{rail_id}/samples", params={"since": 0, "until": 1e11})
    ).json()
    for k, seq in enumerate(window["seq"]):
        sent = {r["index"]: r for r in samples[seq]["phases"]}
        for index, value in enumerate(window["current_a"][k]):
            if index not in sent:
                assert value is None  # a phase not reported stays not reported
            elif "current_a" in sent[index]:
                assert value == sent[index]["current_a"]
            else:
                assert value is not None
        assert window["vin_v"][k] == samples[seq]["vin_v"]
    events = await client.get(f"/v1/rails/{rail_id}/events", params={"limit": 1000})
    assert events.status_code == 200, events.text
    assert all(e["details"].get("seq") in stored for e in events.json()["items"])


# ---------------------------------------------------------------- invalid telemetry

SAMPLE_NUMBERS = ("vin_v", "vout_v")
PHASE_NUMBERS = ("current_a", "temp_c")
WRONG_TYPES: list[Any] = ["twelve", [1.0], {"v": 1.0}, None]


def good_sample(seq: int, phase_count: int = 4) -> Json:
    phases = [{"index": i, "current_a": 20.0, "temp_c": 60.0} for i in range(phase_count)]
    return {"time": T0 + seq, "seq": seq, "vin_v": 12.0, "vout_v": 1.0, "phases": phases}


@st.composite
def spoiled(draw: st.DrawFn, seq: int) -> tuple[Json | str, str]:
    """A sample with one thing wrong, the field the answer must name (after the item's
    ``[k]``). A ``str`` item is raw JSON text (for NaN and Infinity, which JSON lacks)."""
    item = good_sample(seq)
    phase = draw(st.integers(0, 3))
    what = draw(
        st.sampled_from(
            [
                "missing", "wrong type", "non-finite", "phase out of range", "negative phase",
                "phase twice", "fractional phase", "no current", "two currents", "no phases",
                "unknown field", "naive time", "milliseconds", "negative seq", "seq too large",
                "below absolute zero", "negative voltage", "word too large", "cold winding",
                "cold ambient",
            ]
        )
    )  # fmt: skip
    if what == "missing":
        name = draw(st.sampled_from(["time", "seq", "vin_v", "vout_v", "phases"]))
        del item[name]
        return item, f".{name}"
    if what == "wrong type":
        name = draw(st.sampled_from((*SAMPLE_NUMBERS, "seq", "time")))
        item[name] = draw(st.sampled_from(WRONG_TYPES))
        return item, f".{name}"
    if what == "non-finite":
        token = draw(st.sampled_from(["NaN", "Infinity", "-Infinity"]))
        if draw(st.booleans()):
            name = draw(st.sampled_from((*SAMPLE_NUMBERS, "ambient_c", "iout_a", "time")))
            item[name] = "@@"
            field = f".{name}"
        else:
            name = draw(st.sampled_from(PHASE_NUMBERS))
            item["phases"][phase][name] = "@@"
            field = f".phases[{phase}].{name}"
        return json.dumps(item).replace('"@@"', token), field
    if what == "phase out of range":
        item["phases"][phase]["index"] = draw(st.integers(4, 63))
        return item, f".phases[{phase}].index"
    if what == "negative phase":
        item["phases"][phase]["index"] = draw(st.integers(-1000, -1))
        return item, f".phases[{phase}].index"
    if what == "phase twice":
        other = draw(st.integers(0, 3).filter(lambda k: k != phase))
        item["phases"][phase]["index"] = other
        return item, f".phases[{max(phase, other)}].index"
    if what == "fractional phase":
        item["phases"][phase]["index"] = phase + 0.5
        return item, f".phases[{phase}].index"
    if what == "no current":
        del item["phases"][phase]["current_a"]
        return item, f".phases[{phase}]"
    if what == "two currents":
        item["phases"][phase]["read_iout"] = 0xE8A0
        return item, f".phases[{phase}]"
    if what == "no phases":
        item["phases"] = []
        return item, ".phases"
    if what == "unknown field":
        if draw(st.booleans()):
            item["colour"] = "blue"
            return item, ".colour"
        item["phases"][phase]["colour"] = "blue"
        return item, f".phases[{phase}].colour"
    if what == "naive time":
        item["time"] = "2027-01-15T08:30:00"
        return item, ".time"
    if what == "milliseconds":
        item["time"] = (T0 + seq) * 1000.0
        return item, ".time"
    if what == "negative seq":
        item["seq"] = draw(st.integers(-(2**40), -1))
        return item, ".seq"
    if what == "seq too large":
        item["seq"] = draw(st.integers(2**62 + 1, 2**70))
        return item, ".seq"
    if what == "below absolute zero":
        item["phases"][phase]["temp_c"] = draw(st.floats(-1e6, -273.16))
        return item, f".phases[{phase}].temp_c"
    if what == "negative voltage":
        name = draw(st.sampled_from(SAMPLE_NUMBERS))
        item[name] = draw(st.floats(-1e6, -1e-9))
        return item, f".{name}"
    if what in ("cold winding", "cold ambient"):
        # Copper has no resistance left at about -234.5 degC: no sense voltage converts there.
        cold = draw(st.floats(-273.15, -234.5))
        item["phases"][phase] = {"index": phase, "sense_v": 0.006}
        if what == "cold winding":
            item["phases"][phase]["temp_c"] = cold
            return item, f".phases[{phase}].temp_c"
        item["ambient_c"] = cold
        return item, ".ambient_c"
    item["phases"][phase].pop("current_a")
    item["phases"][phase]["read_iout"] = draw(st.integers(0x10000, 2**40))
    return item, f".phases[{phase}].read_iout"


@st.composite
def bad_batches(draw: st.DrawFn) -> tuple[str, int, str]:
    """A JSON batch of new samples (seq 10 on) with one spoiled item, its position, and the
    field the answer must name."""
    size = draw(st.integers(1, 5))
    position = draw(st.integers(0, size - 1))
    bad, field = draw(spoiled(10 + position))
    items = [json.dumps(good_sample(10 + k)) for k in range(size)]
    items[position] = bad if isinstance(bad, str) else json.dumps(bad)
    return "[" + ",".join(items) + "]", position, field


# Everything is drawn before the test body runs: a draw inside an async test could stop the
# example half-way, in the middle of the event loop the examples share.
@EXAMPLES
@given(case=bad_batches())
async def test_a_bad_item_is_refused_with_its_field_and_nothing_is_stored(
    client: httpx.AsyncClient, case: tuple[str, int, str]
) -> None:
    body, position, field = case
    rail_id = await new_rail(client, 4, 2)
    first = await post(client, rail_id, [good_sample(0), good_sample(1)])
    assert first.status_code == 200, first.text
    status_before = (await client.get(f"/v1/rails/{rail_id}/status")).json()

    answer = await client.post(
        f"/v1/rails/{rail_id}/samples", content=body, headers={"content-type": "application/json"}
    )
    assert answer.status_code == 422, answer.text
    got = answer.json()
    assert got["error"] == "invalid_input"
    assert got["field"] == f"[{position}]{field}"
    assert got["detail"]

    assert await stored_seqs(client, rail_id) == [0, 1]
    status_after = (await client.get(f"/v1/rails/{rail_id}/status")).json()
    age = status_after["last_sample"]["age_s"]
    assert status_after == status_before | {
        "last_sample": status_before["last_sample"] | {"age_s": age}
    }
    events = (await client.get(f"/v1/rails/{rail_id}/events", params={"limit": 1000})).json()
    refusals = [e for e in events["items"] if e["kind"] == "telemetry.rejected"]
    assert len(refusals) == 1
    assert refusals[0]["details"]["field"] == got["field"]


@st.composite
def clashes(draw: st.DrawFn) -> tuple[list[Json], int]:
    """A batch of new samples in which one item reuses a stored seq (0..3) with other content."""
    reused = draw(st.integers(0, 3))
    clash = good_sample(reused)
    change = draw(st.sampled_from(["vin_v", "current", "time", "flag"]))
    if change == "vin_v":
        clash["vin_v"] = 11.5
    elif change == "current":
        clash["phases"][draw(st.integers(0, 3))]["current_a"] = 19.0
    elif change == "time":
        clash["time"] = T0 + reused + 0.5
    else:
        clash["phases"][draw(st.integers(0, 3))]["overcurrent"] = True
    size = draw(st.integers(1, 4))
    position = draw(st.integers(0, size - 1))
    items = [good_sample(10 + k) for k in range(size)]
    items[position] = clash
    return items, position


@EXAMPLES
@given(case=clashes())
async def test_a_reused_seq_with_other_content_conflicts_and_changes_nothing(
    client: httpx.AsyncClient, case: tuple[list[Json], int]
) -> None:
    items, position = case
    rail_id = await new_rail(client, 4, 2)
    assert (await post(client, rail_id, [good_sample(k) for k in range(4)])).status_code == 200
    answer = await post(client, rail_id, items)
    assert answer.status_code == 409, answer.text
    assert answer.json()["field"] == f"[{position}].seq"
    assert await stored_seqs(client, rail_id) == [0, 1, 2, 3]


# ---------------------------------------------------------------- regressions these found


async def test_reverse_current_before_isolation_is_taken(client: httpx.AsyncClient) -> None:
    """A phase sinking current (as a low-side fault does) while its isolation is still being
    debounced once taught a negative sharing weight, and every batch holding it was a 500."""
    rail_id = await new_rail(client, 4, 3)
    sinking = [40.0, 40.0, 40.0, -80.0]
    answer = await post(client, rail_id, [good_sample(0), *(sample(k, sinking) for k in (1, 2))])
    assert answer.status_code == 200, answer.text
    assert answer.json()["stored"] == 3
    status = (await client.get(f"/v1/rails/{rail_id}/status")).json()
    assert all(p["share"] >= 0.0 for p in status["phases"])


async def test_a_runaway_estimate_is_reported_not_a_500(client: httpx.AsyncClient) -> None:
    """Garbage readings (a DCR sense of 7.3 V, PMBus words decoding to millions of amps) drive
    the junction estimate into runaway; its covariance once lost symmetry in rounding while
    still finite, which raised instead of being treated as the runaway it is."""
    rail_id = await new_rail(client, 6, 2)
    batch = [
        {"time": T0, "seq": 0, "vin_v": 12.0, "vout_v": 1.0,
         "phases": [{"index": 1, "sense_v": 7.3}]},
        {"time": T0 + 2.6, "seq": 1, "vin_v": 12.0, "vout_v": 1.0,
         "phases": [{"index": 2, "current_a": 0.0}]},
        {"time": T0 + 7.7, "seq": 2, "vin_v": 12.0, "vout_v": 1.0,
         "phases": [{"index": 1, "read_iout": 28249}]},
        {"time": T0 + 68.9, "seq": 3, "vin_v": 12.0, "vout_v": 1.0,
         "phases": [{"index": 4, "read_iout": 2173, "temp_c": -46.7}]},
    ]  # fmt: skip
    answer = await post(client, rail_id, batch)
    assert answer.status_code == 200, answer.text
    assert answer.json()["stored"] == 4
    status = await client.get(f"/v1/rails/{rail_id}/status")
    assert status.status_code == 200, status.text
    assert status.json()["last_sample"]["seq"] == 3


@pytest.mark.parametrize("where", ["temp_c", "ambient_c"])
async def test_a_sense_voltage_colder_than_copper_allows_names_its_temperature(
    client: httpx.AsyncClient, where: str
) -> None:
    """Celsius admits -273.15 degC, but copper's resistance vanishes near -234.5 degC: the
    sense conversion raised there, a 500 instead of a 422 naming the reading."""
    rail_id = await new_rail(client, 4, 2)
    bad = good_sample(1)
    bad["phases"][2] = {"index": 2, "sense_v": 0.006}
    if where == "temp_c":
        bad["phases"][2]["temp_c"] = -250.0
    else:
        bad["ambient_c"] = -250.0
    answer = await post(client, rail_id, [good_sample(0), bad])
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == (
        "[1].phases[2].temp_c" if where == "temp_c" else "[1].ambient_c"
    )
    assert "-234.5" in answer.json()["detail"]
    assert await stored_seqs(client, rail_id) == []
