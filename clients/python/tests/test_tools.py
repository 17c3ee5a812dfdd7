"""Rehearsals and calibration through the client, against the real service."""

from __future__ import annotations

import math
import time

from phaseward_client import Client
from support import open_phase_csv, sample

CSV = "time_s,vin_v,i0_a,i1_a\n" + "\n".join(
    f"{k},12,{25 if 3 <= k <= 6 else 10},10" for k in range(10)
)


def test_upload_rehearse_and_fetch_the_table(client: Client) -> None:
    trace = client.upload_trace(CSV.encode(), name="client test")
    assert (trace["n_samples"], trace["n_phases"]) == (10, 2)
    job = client.start_rehearsal(
        {"trace": {"trace_id": trace["id"]}, "settings": {"oc_level_a": [20.0, 30.0]}}
    )
    deadline = time.monotonic() + 20
    while (state := client.rehearsal(job["id"]))["status"] not in ("done", "failed"):
        assert time.monotonic() < deadline
        time.sleep(0.05)
    assert state["status"] == "done", state["error"]
    assert [row["trips"] for row in state["result"]["rows"]] == [1, 0]  # 25 A vs 20 and 30 A
    table = client.rehearsal_file(job["id"], "table.csv")
    assert table.splitlines()[0].startswith("index,oc_level_a,trips")
    exported = client.export_settings(job["id"], 0)
    assert exported["settings"]["oc_level_a"] == 20.0
    assert exported["figures"]["trips"] == 1
    header = client.export_header(job["id"], 0)
    assert "#define PW_OC_LEVEL_A (20.0)" in header


def test_calibrate_a_one_stage_curve(client: Client, rail_id: str) -> None:
    t = [0.5 * k for k in range(200)]
    temp = [25.0 + 2.0 * 8.0 * (1 - math.exp(-x / 10.0)) for x in t]  # 2 W into 8 K/W, 10 s
    fit = client.calibrate(rail_id, {"t_s": t, "temp_c": temp, "power_w": 2.0, "orders": [1]})
    (stage,) = fit["chosen"]["stages"]
    assert abs(stage["r_k_per_w"] - 8.0) < 1e-3
    assert abs(stage["tau_s"] - 10.0) < 1e-2
    same = client.fit_curve({"t_s": t, "temp_c": temp, "power_w": 2.0, "orders": [1]})
    assert abs(same["chosen"]["total_r_k_per_w"] - 8.0) < 1e-3
    assert same["settled"] is True  # 100 s against 3 x 10 s


def test_follow_the_event_stream(client: Client, rail_id: str) -> None:
    body = [sample(k, [20.0] * 4, temps=100.0 if k == 0 else 120.0) for k in range(2)]
    client.post_samples(rail_id, body)
    events = list(client.follow_events(rail_id=rail_id, after=0, limit=2))
    # 120 degC is past the test rail's 115 degC warning level on all four phases.
    assert [e.kind for e in events] == ["rail.condition", "thermal.warning"]
    assert all(e.rail_id == rail_id for e in events)


def test_upload_a_capture_for_an_isolation(client: Client, rail_id: str) -> None:
    client.post_samples(rail_id, [sample(k, [20.0] * 4) for k in range(5)])
    client.post_samples(rail_id, [sample(k, [80 / 3, 0.0, 80 / 3, 80 / 3], tripped=1)
                                  for k in range(5, 8)])  # fmt: skip
    (event,) = client.list_events(rail_id, kind=["phase.isolated"]).items
    assert event.details["signature"]["kind"] == "undetermined"
    answer = client.upload_capture(rail_id, event.id, open_phase_csv())
    assert answer["signature"]["kind"] == "open_phase"
    assert answer["signature"]["source"] == "capture"
    assert "monitoring aid" in answer["caution"]
    (again,) = client.list_events(rail_id, kind=["phase.isolated"]).items
    assert again.details["signature"] == answer["signature"]
