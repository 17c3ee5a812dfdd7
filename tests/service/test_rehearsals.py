"""Rehearsals through the API: jobs, results, CSV, the Pareto plot; trips worked by hand."""

from __future__ import annotations

import asyncio
import csv
import io
from typing import Any

import httpx
import pytest

pytestmark = pytest.mark.anyio

# Two phases, one sample a second. Phase 0 over-currents from 3 s to 6 s (a real fault);
# phase 1 has a one-sample spike at 8 s (noise).
CSV_ROWS = ["time_s,vin_v,i0_a,i1_a"] + [
    f"{k},12,{25 if 3 <= k <= 6 else 10},{30 if k == 8 else 10}" for k in range(10)
]


async def upload(client: httpx.AsyncClient) -> int:
    answer = await client.post(
        "/v1/traces", content="\n".join(CSV_ROWS), headers={"content-type": "text/csv"}
    )
    assert answer.status_code == 201, answer.text
    trace_id: int = answer.json()["id"]
    return trace_id


async def finished(client: httpx.AsyncClient, job: dict[str, Any]) -> dict[str, Any]:
    for _ in range(200):
        state: dict[str, Any] = (await client.get(f"/v1/rehearsals/{job['id']}")).json()
        if state["status"] in ("done", "failed"):
            return state
        await asyncio.sleep(0.05)
    raise AssertionError("the rehearsal did not finish")


async def test_single_rehearsal_lists_its_trips(client: httpx.AsyncClient) -> None:
    trace_id = await upload(client)
    body = {"trace": {"trace_id": trace_id}, "settings": {"oc_level_a": 20.0}}
    answer = await client.post("/v1/rehearsals", json=body)
    assert answer.status_code == 202, answer.text
    done = await finished(client, answer.json())
    assert done["status"] == "done", done["error"]
    trips = done["result"]["trips"]
    # By hand: phase 0 crosses 20 A at 3 s, phase 1 at 8 s; no debounce.
    assert [(t["time_s"], t["phase"], t["rule"], t["value"]) for t in trips] == [
        (3.0, 0, "over_current", 25.0),
        (8.0, 1, "over_current", 30.0),
    ]


async def test_sweep_scores_pareto_csv_and_svg(client: httpx.AsyncClient) -> None:
    trace_id = await upload(client)
    body = {
        "trace": {"trace_id": trace_id},
        "settings": {"oc_level_a": [20.0, 28.0], "oc_debounce_s": [0.0, 1.0]},
        "labels": [{"start_s": 3.0, "end_s": 6.0, "phase": 0, "kind": "over_current"}],
    }
    done = await finished(client, (await client.post("/v1/rehearsals", json=body)).json())
    result = done["result"]
    assert result["combinations"] == 4
    scored = [
        (r["trips"], r["false_trips"], r["missed"], r["max_latency_s"]) for r in result["rows"]
    ]
    # By hand: (20 A, 0 s) trips both (spike is false), latency 0; (20 A, 1 s) waits 1 s and
    # ignores the spike; 28 A misses the 25 A fault; (28 A, 0 s) still trips on the spike.
    assert scored == [(2, 1, 0, 0.0), (1, 0, 0, 1.0), (1, 1, 1, None), (0, 0, 1, None)]
    # The front: (1 s) has no false trip; (0 s) is faster but trips falsely once. The 28 A
    # settings miss the fault, the worst latency, and are beaten.
    assert result["pareto"] == [1, 0]
    table = (await client.get(f"/v1/rehearsals/{done['id']}/table.csv")).text
    rows = list(csv.DictReader(io.StringIO(table)))
    assert [r["false_trips"] for r in rows] == ["1", "0", "1", "0"]
    assert [r["pareto"] for r in rows] == ["1", "1", "0", "0"]
    svg = await client.get(f"/v1/rehearsals/{done['id']}/pareto.svg")
    assert svg.headers["content-type"].startswith("image/svg+xml")
    assert svg.text.startswith("<svg")
    assert "combination 1" in svg.text


async def test_rehearsal_on_a_stored_rail_window(client: httpx.AsyncClient) -> None:
    from tests.factories import SMALL_RAIL, sample

    await client.post("/v1/rails", json=SMALL_RAIL)
    await client.post(
        "/v1/rails/bench-a/samples", json=[sample(k, [20.0, 20.0, 20.0, 35.0]) for k in range(5)]
    )
    body = {
        "trace": {"rail_id": "bench-a", "since": 0, "until": 1e10},
        "settings": {"oc_level_a": 30.0, "oc_debounce_s": 2.0},
    }
    done = await finished(client, (await client.post("/v1/rehearsals", json=body)).json())
    assert [(t["time_s"] - 1.8e9, t["phase"]) for t in done["result"]["trips"]] == [(2.0, 3)]


async def test_a_window_of_one_sample_is_refused_before_a_job_exists(
    client: httpx.AsyncClient,
) -> None:
    from tests.factories import SMALL_RAIL, sample

    await client.post("/v1/rails", json=SMALL_RAIL)
    await client.post("/v1/rails/bench-a/samples", json=[sample(0, [20.0] * 4)])
    body = {"trace": {"rail_id": "bench-a", "since": 0, "until": 1e10}, "settings": WATCH}
    one = await client.post("/v1/rehearsals", json=body)
    assert (one.status_code, one.json()["field"]) == (422, "trace"), one.text
    assert "fewer than two samples" in one.json()["detail"]
    assert (await client.get("/v1/rehearsals/1")).status_code == 404  # no job was made


LABEL = {"start_s": 1.0, "end_s": 2.0, "phase": 0, "kind": "any"}


@pytest.mark.parametrize(
    ("body", "field", "cause"),
    [
        ({"trace": {"trace_id": 999}, "settings": {"oc_level_a": 1.0}}, "trace.trace_id",
         "no trace 999"),
        ({"settings": {"oc_level_a": [1.0] * 101, "dead_floor_a": [1.0] * 100}}, "settings",
         "oc_level_a (101) x dead_floor_a (100) = 10100 combinations"),
        ({"settings": {"oc_limit": 1.0}}, "settings.oc_limit", "Extra inputs"),
        ({"settings": {"oc_level_a": [10, "x"]}}, "settings.oc_level_a", "'x' is not a number"),
        ({"settings": {"oc_level_a": []}}, "settings.oc_level_a", "list of 1 to"),
        ({"settings": {"oc_debounce_s": -0.001}}, "settings.oc_debounce_s", "must be >= 0"),
        ({"settings": {"blanking_s": [0.0, -1.0]}}, "settings.blanking_s", "must be >= 0"),
        ({"settings": {"step_a": -2.0}}, "settings.step_a", "must be >= 0"),
        ({"settings": {"dead_time_s": 1.0}}, "settings.dead_time_s", "Extra inputs"),
        ({"settings": {}, "labels": [{**LABEL, "end_s": 0.5}]}, "labels[0]", "end_s"),
        ({"settings": {"oc_level_a": 1.0}, "labels": [{**LABEL, "phase": 2}]},
         "labels[0].phase", "beyond the trace's 2 phases"),
        ({"settings": {"oc_level_a": 1.0}, "labels": [{**LABEL, "kind": "overcurrent"}]},
         "labels[0].kind", "'overcurrent' is not 'any'"),
        ({"settings": {"uv_level_v": 1.0}, "labels": [{**LABEL, "kind": "under_voltage"}]},
         "labels[0].kind", "never trips on phase 0"),
        ({"settings": {"oc_level_a": 1.0}, "labels": [{**LABEL, "kind": "over_temperature"}]},
         "labels[0].kind", "set ot_level_c"),
        ({"settings": {"uv_level_v": 1.0}, "labels": [LABEL]}, "labels[0].kind",
         "set oc_level_a or ot_level_c or imbalance_pct or dead_floor_a"),
        ({"settings": {}, "missing": {"policy": "hold", "hold_s": -1}}, "missing.hold_s", ""),
    ],
)  # fmt: skip
async def test_bad_rehearsals_are_refused_before_a_job_exists(
    client: httpx.AsyncClient, body: dict[str, Any], field: str, cause: str
) -> None:
    trace_id = await upload(client)
    answer = await client.post("/v1/rehearsals", json={"trace": {"trace_id": trace_id}, **body})
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
    assert cause in answer.json()["detail"]
    assert (await client.get("/v1/rehearsals/1")).status_code == 404  # no job was made


async def test_unknown_rehearsal(client: httpx.AsyncClient) -> None:
    assert (await client.get("/v1/rehearsals/12345")).status_code == 404


# --- issue 18: isolated phases, missing readings, export, short jobs ------------------------

WATCH = {"dead_floor_a": 1.0, "imbalance_pct": 50.0, "dead_others_min_a": 5.0}


async def rules_on_phase_2(client: httpx.AsyncClient, trace: dict[str, Any]) -> list[str]:
    body = {"trace": trace, "settings": WATCH}
    done = await finished(client, (await client.post("/v1/rehearsals", json=body)).json())
    assert done["status"] == "done", done
    return sorted({t["rule"] for t in done["result"]["trips"] if t["phase"] == 2})


async def test_an_isolated_phase_trips_neither_dead_phase_nor_imbalance(
    client: httpx.AsyncClient,
) -> None:
    """Phase 2 is isolated at 0 A from 2 s on: the rules watch only present phases, so the
    mask must reach them from a CSV column, from JSON flags and from a rail's stored window."""
    rows = [f"{k},12,20,20,{0 if k >= 2 else 20},20,{int(k >= 2)}" for k in range(6)]
    csv_iso = "time_s,vin_v,i0_a,i1_a,i2_a,i3_a,iso2\n" + "\n".join(rows)
    csv_plain = "\n".join(r.rsplit(",", 1)[0] for r in csv_iso.splitlines()).replace(",iso2", "")
    ids = []
    for text in (csv_iso, csv_plain):
        up = await client.post("/v1/traces", content=text, headers={"content-type": "text/csv"})
        ids.append(up.json()["id"])
    assert await rules_on_phase_2(client, {"trace_id": ids[0]}) == []
    assert await rules_on_phase_2(client, {"trace_id": ids[1]}) == ["dead_phase", "imbalance"]

    from tests.factories import SMALL_RAIL, sample

    samples_ = [sample(k, [20.0, 20.0, 0.0 if k >= 2 else 20.0, 20.0]) for k in range(6)]
    for s in samples_[2:]:
        s["phases"][2]["breaker_tripped"] = True
    up = await client.post("/v1/traces", json=samples_)
    assert await rules_on_phase_2(client, {"trace_id": up.json()["id"]}) == []
    await client.post("/v1/rails", json=SMALL_RAIL)
    await client.post("/v1/rails/bench-a/samples", json=samples_)
    window = {"rail_id": "bench-a", "since": 0, "until": 1e10}
    assert await rules_on_phase_2(client, window) == []


async def test_missing_readings_hold_by_default_or_clear(client: httpx.AsyncClient) -> None:
    """Temperature read every other sample, 20 K above the level (issue 18, item 3)."""
    rows = [f"{k * 0.001:.3f},12,10,{120 if k % 2 == 0 else ''}" for k in range(40)]
    text = "time_s,vin_v,i0_a,t0_c\n" + "\n".join(rows)
    up = await client.post("/v1/traces", content=text, headers={"content-type": "text/csv"})
    settings = {"ot_level_c": 100.0, "ot_debounce_s": [0.0, 0.01]}
    counts = {}
    for missing in (None, {"policy": "clear"}, {"policy": "hold", "hold_s": 0.0005}):
        body = {"trace": {"trace_id": up.json()["id"]}, "settings": settings}
        if missing is not None:
            body["missing"] = missing
        done = await finished(client, (await client.post("/v1/rehearsals", json=body)).json())
        counts[str(missing)] = [r["trips"] for r in done["result"]["rows"]]
    assert counts == {
        "None": [1, 1],  # held (default, 1 s): one long condition, one trip at either debounce
        "{'policy': 'clear'}": [20, 0],  # each gap clears: 20 trips, or none that lasts 10 ms
        "{'policy': 'hold', 'hold_s': 0.0005}": [20, 0],  # a hold shorter than the gap
    }


async def test_export_as_json_and_c_header_round_trips(client: httpx.AsyncClient) -> None:
    trace_id = await upload(client)
    labels = [{"start_s": 3.0, "end_s": 6.0, "phase": 0, "kind": "over_current"}]
    body = {
        "trace": {"trace_id": trace_id},
        "settings": {"oc_level_a": [20.0, 28.0], "oc_debounce_s": [0.0, 1.0],
                     "oc_release_a": 15.0},
        "labels": labels,
        "missing": {"policy": "clear"},
    }  # fmt: skip
    done = await finished(client, (await client.post("/v1/rehearsals", json=body)).json())
    row = done["result"]["rows"][1]
    exported = (await client.get(f"/v1/rehearsals/{done['id']}/rows/1/settings.json")).json()
    assert exported["settings"]["oc_level_a"] == 20.0
    assert exported["settings"]["oc_debounce_s"] == 1.0
    assert exported["settings"]["ot_level_c"] is None  # off
    assert exported["figures"]["false_trips"] == row["false_trips"]
    assert exported["trace"]["trace_id"] == trace_id
    again = {
        "trace": {"trace_id": trace_id}, "settings": exported["settings"],
        "labels": exported["labels"], "missing": exported["missing"],
    }  # fmt: skip
    redo = await finished(client, (await client.post("/v1/rehearsals", json=again)).json())
    (same,) = redo["result"]["rows"]
    for key in ("trips", "trips_by_rule", "false_trips", "missed", "max_latency_s", "latency_s"):
        assert same[key] == row[key], key
    header = await client.get(f"/v1/rehearsals/{done['id']}/rows/1/settings.h")
    assert header.status_code == 200
    text = header.text
    for line in (
        "#define PW_OC_ENABLED 1",
        "#define PW_OC_LEVEL_A (20.0)",
        "#define PW_OC_RELEASE_A (15.0)",
        "#define PW_OC_DEBOUNCE_NS 1000000000LL",
        "#define PW_OT_ENABLED 0",
        f'trace {trace_id} "trace"',
        f"from rehearsal {done['id']}, row 1",
        f"{row['trips']} trips, {row['false_trips']} false",
    ):
        assert line in text, line
    bad = await client.get(f"/v1/rehearsals/{done['id']}/rows/9/settings.json")
    assert (bad.status_code, bad.json()["field"]) == (422, "row")


async def test_the_c_header_compiles(client: httpx.AsyncClient, tmp_path: Any) -> None:
    import shutil
    import subprocess

    cc = shutil.which("cc") or shutil.which("gcc")
    if cc is None:
        pytest.skip("no C compiler")
    trace_id = await upload(client)
    body = {"trace": {"trace_id": trace_id},
            "settings": {"oc_level_a": 20.0, "uv_level_v": 11.0, "blanking_s": 0.5,
                         "step_a": 5.0}}  # fmt: skip
    done = await finished(client, (await client.post("/v1/rehearsals", json=body)).json())
    header = (await client.get(f"/v1/rehearsals/{done['id']}/rows/0/settings.h")).text
    (tmp_path / "settings.h").write_text(header)
    (tmp_path / "main.c").write_text(
        '#include "settings.h"\nint main(void) { return PW_OC_ENABLED && PW_OC_LEVEL_A > 19.0 '
        "&& PW_UV_DEBOUNCE_NS == 0 && PW_BLANKING_NS == 500000000LL ? 0 : 1; }\n"
    )
    build = subprocess.run(
        [cc, "-std=c99", "-Wall", "-Werror", "-o", str(tmp_path / "m"), str(tmp_path / "main.c")],
        capture_output=True, text=True, check=False,
    )  # fmt: skip
    assert build.returncode == 0, build.stderr
    assert subprocess.run([str(tmp_path / "m")], check=False).returncode == 0


async def test_a_short_job_does_not_wait_behind_a_long_one(client: httpx.AsyncClient) -> None:
    """Issue 18, item 7: a one-combination rehearsal finishes while a 10,000-combination one
    still runs."""
    rows = [f"{k * 0.001:.3f},12,{10 + (k % 7)},{10 + (k % 5)}" for k in range(20_000)]
    text = "time_s,vin_v,i0_a,i1_a\n" + "\n".join(rows)
    up = await client.post("/v1/traces", content=text, headers={"content-type": "text/csv"})
    trace = {"trace_id": up.json()["id"]}
    long_settings = {"oc_level_a": [10.0 + k * 0.01 for k in range(100)],
                     "oc_debounce_s": [k * 1e-4 for k in range(100)]}  # fmt: skip
    long = await client.post("/v1/rehearsals", json={"trace": trace, "settings": long_settings})
    short = await client.post("/v1/rehearsals", json={"trace": trace, "settings": WATCH})
    done = await finished(client, short.json())
    assert done["status"] == "done"
    state = (await client.get(f"/v1/rehearsals/{long.json()['id']}")).json()
    assert state["status"] in ("queued", "running")
