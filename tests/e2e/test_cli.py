"""The operator and developer commands against a real service (and an embedded one)."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from tests.buck_sim import BuckCase, as_npz, columns, simulate
from tests.factories import SMALL_RAIL, sample
from tests.servers import free_port, start_server

pytestmark = pytest.mark.e2e


@pytest.fixture
def base(tmp_path: Path) -> Iterator[str]:
    port = free_port()
    proc = start_server(tmp_path / "served", port)
    url = f"http://127.0.0.1:{port}"
    httpx.post(f"{url}/v1/rails", json=SMALL_RAIL).raise_for_status()
    body = [sample(k, [20.0, 20.0, 20.0, 20.0]) for k in range(5)]
    httpx.post(f"{url}/v1/rails/bench-a/samples", json=body).raise_for_status()
    try:
        yield url
    finally:
        proc.terminate()
        proc.wait(timeout=20)


def run(*args: str, env: dict[str, str] | None = None, ok: bool = True) -> Any:
    done = subprocess.run(
        [sys.executable, "-m", "phaseward.cli", *args, "--json"],
        capture_output=True, text=True, timeout=120, env=env,
    )  # fmt: skip
    if not ok:
        assert done.returncode != 0
        return done.stderr
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def test_status_screening_forecast_events(base: str) -> None:
    status = run("status", "bench-a", "--url", base)
    assert status["condition"] == "nominal"
    assert status["capacity"]["capacity_a"] == pytest.approx(120.0, rel=1e-5)
    screening = run("screening", "bench-a", "--depth", "2", "--url", base)
    assert len(screening["cases"]) == 6
    ahead = run("forecast", "bench-a", "--load", "100", "--drop", "1", "--drop", "2", "--url", base)
    # 50 A on each of two phases, past their 40 A trip current: both trip, the rail is down.
    assert ahead["verdict"] == "down"
    assert [c["cause"] for c in ahead["cascade"]] == ["requested"] * 2 + ["trip_current"] * 2
    rated = run("ratings", "bench-a", "--minutes", "1", "--minutes", "30", "--url", base)
    assert rated["durations_s"] == [60.0, 1800.0, None]
    assert rated["cases"][0]["ratings"][0]["rating_a"] == pytest.approx(120.0)  # 4 x 30 A
    assert [c["lose_phases"] for c in rated["cases"]] == [[], [0], [1], [2], [3]]
    table = subprocess.run(
        [sys.executable, "-m", "phaseward.cli", "ratings", "bench-a", "--url", base],
        capture_output=True, text=True, timeout=120, check=True,
    ).stdout  # fmt: skip
    assert "indefinitely" in table
    assert "warning line" in table
    events = run("events", "--rail", "bench-a", "--url", base)
    assert [e["kind"] for e in events] == ["rail.condition"]


def test_calibrate_and_a_refusal(base: str, tmp_path: Path) -> None:
    curve = tmp_path / "curve.csv"
    rows = [f"{0.5 * k},{25 + 16 * (1 - math.exp(-0.05 * k))}" for k in range(200)]
    curve.write_text("time_s,temp_c\n" + "\n".join(rows))  # 2 W into 8 K/W, tau 10 s
    fit = run("calibrate", str(curve), "--rail", "bench-a", "--power", "2", "--url", base)
    assert fit["order"] == 1
    assert fit["chosen"]["stages"][0]["r_k_per_w"] == pytest.approx(8.0, rel=1e-3)
    refusal = run(
        "calibrate", str(curve), "--rail", "nope", "--power", "2", "--url", base, ok=False
    )
    assert "404 not_found (rail_id): no rail 'nope'" in refusal


def test_rehearse_and_calibrate_on_an_embedded_service(tmp_path: Path) -> None:
    trace = tmp_path / "trace.csv"
    trace.write_text("time_s,vin_v,i0_a,i1_a\n" + "\n".join(
        f"{k},12,{25 if 3 <= k <= 6 else 10},10" for k in range(10)))  # fmt: skip
    settings = tmp_path / "settings.json"
    settings.write_text(json.dumps({"oc_level_a": [20, 30], "oc_debounce_s": [0, 1]}))
    table, plot = tmp_path / "table.csv", tmp_path / "front.svg"
    env = os.environ | {
        "PHASEWARD_URL": f"http://127.0.0.1:{free_port()}",  # nothing answers there
        "PHASEWARD_DATA_DIR": str(tmp_path / "embedded"),
    }
    result = run("rehearse", str(trace), "--settings", str(settings), "--csv", str(table),
                 "--svg", str(plot), env=env)  # fmt: skip
    assert result["combinations"] == 4
    assert [r["trips"] for r in result["rows"]] == [1, 1, 0, 0]
    assert table.read_text().startswith("index,oc_level_a,oc_debounce_s")
    assert plot.read_text().startswith("<svg")


def test_retain_and_keys_commands(tmp_path: Path) -> None:
    env = os.environ | {"PHASEWARD_DATA_DIR": str(tmp_path)}
    env.pop("PHASEWARD_DATABASE_URL", None)

    def cli(*args: str) -> str:
        done = subprocess.run([sys.executable, "-m", "phaseward.cli", *args], env=env,
                              capture_output=True, text=True, timeout=120)  # fmt: skip
        assert done.returncode == 0, done.stderr
        return done.stdout

    assert "0 intervals kept as summaries, 0 samples deleted" in cli(
        "retain", "--older-than-days", "7"
    )
    made = cli("keys", "create", "--role", "read", "--name", "wall display")
    plain = made.splitlines()[1]
    assert plain.startswith("pwk_")
    listed = cli("keys", "list")
    assert "wall display" in listed
    assert plain not in listed
    assert "revoked" in cli("keys", "revoke", "1")


def test_status_in_words_names_an_implausible_reading_and_the_sample_age(base: str) -> None:
    glitch = sample(5, [1e9, 20.0, 20.0, 20.0])
    httpx.post(f"{base}/v1/rails/bench-a/samples", json=glitch).raise_for_status()
    done = subprocess.run(
        [sys.executable, "-m", "phaseward.cli", "status", "bench-a", "--url", base],
        capture_output=True, text=True, timeout=120, env=os.environ | {"COLUMNS": "200"},
    )  # fmt: skip
    assert done.returncode == 0, done.stderr
    assert "suspect: implausible reading 1e+09 A (current_above_limit), left out" in done.stdout
    # The test data is dated 2027, the server's clock is the real one: honest either way.
    assert "newest sample seq 5, " in done.stdout
    assert ("ahead of this server's clock" in done.stdout) != (" s ago" in done.stdout)


def test_capture_is_uploaded_and_classified(base: str, tmp_path: Path) -> None:
    tripped = [sample(k, [80 / 3, 0.0, 80 / 3, 80 / 3]) for k in range(5, 8)]
    for body in tripped:
        body["phases"][1]["breaker_tripped"] = True
    httpx.post(f"{base}/v1/rails/bench-a/samples", json=tripped).raise_for_status()
    (event,) = run("events", "--rail", "bench-a", "--kind", "phase.isolated", "--url", base)
    path = tmp_path / "trip.npz"
    path.write_bytes(as_npz(columns(simulate(BuckCase(fault="gate_drive_loss", noise=0.02)), 1)))
    answer = run("capture", "bench-a", str(event["id"]), str(path), "--url", base)
    assert answer["signature"]["kind"] == "gate_drive_loss"
    assert answer["event_id"] == event["id"]
    wrong = tmp_path / "trip.txt"
    wrong.write_text("not a capture")
    assert "a capture is a .csv, .npy or .npz file" in run(
        "capture", "bench-a", str(event["id"]), str(wrong), "--url", base, ok=False
    )


def plain(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    """A command as a person runs it: tables, an 80-column terminal."""
    env = (env or dict(os.environ)) | {"COLUMNS": "80"}
    return subprocess.run(
        [sys.executable, "-m", "phaseward.cli", *args],
        capture_output=True, text=True, timeout=120, env=env,
    )  # fmt: skip


def test_rehearse_a_csv_saved_as_txt_and_export_a_row(base: str, tmp_path: Path) -> None:
    """Issue 18: the trace type comes from content; eight swept axes stay readable at 80
    columns with tied rows grouped; a row exported as a C header and as JSON."""
    trace = tmp_path / "bench run.txt"
    trace.write_text("\ufefftime_s,vin_v,i0_a,i1_a\n" + "\n".join(
        f"{k},12,{25 if 3 <= k <= 6 else 10},10" for k in range(10)) + "\n\n")  # fmt: skip
    axes = {
        "oc_level_a": [20, 30], "oc_debounce_s": [0, 1], "ot_level_c": [90, 100],
        "ot_debounce_s": [0, 1], "imbalance_pct": [50, 80], "imbalance_debounce_s": [0, 2],
        "dead_floor_a": [1, 2], "dead_debounce_s": [0, 1],
    }  # fmt: skip
    settings = tmp_path / "settings.json"
    settings.write_text(json.dumps(axes))
    shown = plain("rehearse", str(trace), "--settings", str(settings), "--url", base)
    assert shown.returncode == 0, shown.stderr
    lines = shown.stdout.splitlines()
    assert max(len(line) for line in lines) <= 80
    for name in axes:
        assert name in shown.stdout  # whole, not truncated
    assert "tied" in shown.stdout
    result = run("rehearse", str(trace), "--settings", str(settings), "--url", base)
    assert result["combinations"] == 256
    front_rows = sum(len(g["rows"]) for g in result["pareto_groups"])
    assert len(result["pareto_groups"]) < front_rows  # ties are grouped
    header = tmp_path / "protection.h"
    exported = run("export-settings", "2", "0", "--header", str(header), "--url", base)
    assert exported["settings"]["oc_level_a"] == 20.0
    assert "#define PW_OC_LEVEL_A (20.0)" in header.read_text()


def test_calibrate_with_power_needs_no_rail_and_takes_orders(tmp_path: Path) -> None:
    curve = tmp_path / "heating.csv"
    rows = [f"{0.5 * k},{25 + 16 * (1 - math.exp(-0.05 * k))}" for k in range(200)]
    rows[7] = f"{0.5 * 7},nan"  # no reading: left out
    curve.write_text("\ufefftime_s,temp_c\n" + "\n".join(rows) + "\n\n")
    env = os.environ | {
        "PHASEWARD_URL": f"http://127.0.0.1:{free_port()}",  # nothing answers there
        "PHASEWARD_DATA_DIR": str(tmp_path / "fresh"),
    }
    env.pop("PHASEWARD_DATABASE_URL", None)
    fit = run("calibrate", str(curve), "--power", "2", "--orders", "1,2",
              "--reference-temp", "25", env=env)  # fmt: skip
    assert [f["order"] for f in fit["fits"]] == [1, 2]
    assert fit["chosen"]["total_r_k_per_w"] == pytest.approx(8.0, rel=1e-3)
    assert fit["settled"] is True
    shown = plain("calibrate", str(curve), "--power", "2", "--orders", "1", env=env)
    assert shown.returncode == 0, shown.stderr
    assert "total thermal resistance 8" in shown.stdout
    assert max(len(line) for line in shown.stdout.splitlines()) <= 80
    rows[9] = "4.5,warm"
    curve.write_text("time_s,temp_c\n" + "\n".join(rows))
    bad = plain("calibrate", str(curve), "--power", "2", env=env)
    assert bad.returncode != 0
    assert "Traceback" not in bad.stderr
    assert bad.returncode == 2  # a usage error: nothing was attempted
    assert bad.stderr.strip().splitlines() == [
        f"phaseward calibrate: the heating curve {curve}, line 11: time_s '4.5' or temp_c "
        "'warm' is not a number"
    ]
    nothing = plain("calibrate", str(curve), "--current", "20", env=env)
    assert nothing.returncode != 0
    assert "--rail" in nothing.stderr
