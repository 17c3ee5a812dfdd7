"""Every command's error paths in a subprocess, as a user meets them: one line naming the
problem and what to do, never a traceback; exit 2 for usage errors, 1 for failures. Also the
help (on every option, plain text) and output that fits 80 columns."""

from __future__ import annotations

import argparse
import json
import os
import socket
import sqlite3
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from tests.factories import SMALL_RAIL, rail_spec, sample
from tests.servers import free_port, start_server

from phaseward.cli import DEMO_MARK, build_parser

pytestmark = pytest.mark.e2e


def cli(
    *args: str, env: dict[str, str] | None = None, cwd: Path | None = None
) -> subprocess.CompletedProcess[str]:
    base = os.environ | {"COLUMNS": "80"}
    base.pop("PHASEWARD_DATABASE_URL", None)
    return subprocess.run(
        [sys.executable, "-m", "phaseward.cli", *args], capture_output=True, text=True,
        timeout=180, env=base | (env or {}), cwd=cwd,
    )  # fmt: skip


def one_line(done: subprocess.CompletedProcess[str], code: int, *words: str) -> str:
    """The command exited with ``code`` and said one line on stderr containing ``words``."""
    assert "Traceback" not in done.stderr, done.stderr
    assert done.returncode == code, (done.returncode, done.stderr)
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1, done.stderr
    for word in words:
        assert word in lines[0], lines[0]
    return lines[0]


def usage_error(done: subprocess.CompletedProcess[str], *words: str) -> None:
    """argparse's own usage error: the usage line, then one line naming the problem; exit 2."""
    assert "Traceback" not in done.stderr, done.stderr
    assert done.returncode == 2, (done.returncode, done.stderr)
    last = done.stderr.strip().splitlines()[-1]
    assert "error:" in last
    for word in words:
        assert word in last, last


@pytest.fixture
def served(tmp_path: Path) -> Iterator[str]:
    port = free_port()
    proc = start_server(tmp_path / "served", port)
    url = f"http://127.0.0.1:{port}"
    try:
        httpx.post(f"{url}/v1/rails", json=SMALL_RAIL).raise_for_status()
        body = [sample(k, [20.0, 20.0, 20.0, 20.0]) for k in range(3)]
        lost = [sample(k, [30.0, 30.0, 0.0, 30.0]) for k in range(3, 6)]
        for one in lost:
            one["phases"][2]["breaker_tripped"] = True
        body += lost
        httpx.post(f"{url}/v1/rails/bench-a/samples", json=body).raise_for_status()
        yield url
    finally:
        proc.terminate()
        proc.wait(timeout=20)


@pytest.fixture
def taken_port() -> Iterator[int]:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        yield int(s.getsockname()[1])


def test_every_option_has_plain_help() -> None:
    def parsers(p: argparse.ArgumentParser) -> Iterator[argparse.ArgumentParser]:
        yield p
        for action in p._actions:
            if isinstance(action, argparse._SubParsersAction):
                for child in action.choices.values():
                    yield from parsers(child)

    for p in parsers(build_parser()):
        for action in p._actions:
            if isinstance(action, argparse._HelpAction | argparse._SubParsersAction):
                continue
            assert action.help, f"{p.prog} {action.dest} has no help"
        text = p.format_help()
        for markup in ("``", "[bold", "[dim", "[red", ":class:"):
            assert markup not in text, f"{p.prog}: markup {markup} in help"
    done = cli("--help")
    assert done.returncode == 0
    assert "``" not in done.stdout


@pytest.mark.parametrize(
    ("args", "words"),
    [
        ((), ("required", "COMMAND")),
        (("nope",), ("invalid choice",)),
        (("serve", "--port", "abc"), ("--port",)),
        (("keys", "create", "--name", "x"), ("--role",)),
        (("retain",), ("--older-than-days",)),
        (("status",), ("rail",)),
        (("events", "--limit", "many"), ("--limit",)),
        (("screening", "bench-a", "--depth", "3"), ("--depth",)),
        (("forecast", "bench-a", "--hours", "soon"), ("--hours",)),
        (("rehearse", "t.csv"), ("--settings",)),
        (("calibrate", "c.csv", "--rail", "bench-a"), ("--power", "--current")),
    ],
)
def test_usage_errors_exit_2(args: tuple[str, ...], words: tuple[str, ...]) -> None:
    usage_error(cli(*args), *words)


def test_settings_refused_in_one_line(tmp_path: Path) -> None:
    env = {"PHASEWARD_DATA_DIR": str(tmp_path)}
    one_line(cli("serve", env=env | {"PHASEWARD_AUTH_MODE": "open", "PHASEWARD_HOST": "0.0.0.0"}),
             2, "loopback only", "PHASEWARD_AUTH_MODE=keys")  # fmt: skip
    one_line(cli("serve", env=env | {"PHASEWARD_PORT": "abc"}), 2, "PHASEWARD_PORT")
    one_line(cli("keys", "list", env=env | {"PHASEWARD_LOG_LEVEL": "loud"}), 2,
             "PHASEWARD_LOG_LEVEL")  # fmt: skip


def test_port_in_use(tmp_path: Path, taken_port: int) -> None:
    env = {"PHASEWARD_DATA_DIR": str(tmp_path / "d"), "PHASEWARD_AUTH_MODE": "open"}
    one_line(cli("serve", "--port", str(taken_port), env=env), 1, "already in use", "--port")
    one_line(cli("demo", "--once", "--port", str(taken_port), cwd=tmp_path), 1, "already in use")


def test_keys_revoke_unknown(tmp_path: Path) -> None:
    env = {"PHASEWARD_DATA_DIR": str(tmp_path)}
    one_line(cli("keys", "revoke", "99", env=env), 1, "no key 99", "keys list")


def test_no_service_and_bad_url(tmp_path: Path) -> None:
    nobody = f"http://127.0.0.1:{free_port()}"
    for args in (("status", "bench-a"), ("events",), ("screening", "bench-a"),
                 ("forecast", "bench-a")):  # fmt: skip
        one_line(cli(*args, "--url", nobody), 1, "no phaseward service answers", "PHASEWARD_URL")
    one_line(cli("status", "bench-a", "--url", "ftp://x"), 2, "not an http")


def test_input_files(tmp_path: Path, served: str) -> None:
    good = tmp_path / "s.json"
    good.write_text(json.dumps({"oc_level_a": 30}))
    bad = tmp_path / "bad.json"
    bad.write_text("{oc_level_a: 30")
    trace = tmp_path / "t.csv"
    trace.write_text("time_s,vin_v,i0_a\n0,12,10\n1,12,10\n")
    url = ("--url", served)
    one_line(cli("rehearse", str(tmp_path / "none.csv"), "--settings", str(good), *url), 2,
             "does not exist")  # fmt: skip
    one_line(cli("rehearse", str(trace), "--settings", str(bad), *url), 2, "not valid JSON",
             "line 1")  # fmt: skip
    one_line(cli("rehearse", str(trace), "--settings", str(tmp_path), *url), 2, "directory")
    one_line(cli("calibrate", str(tmp_path / "none.csv"), "--rail", "bench-a", "--power", "2",
                 *url), 2, "does not exist")  # fmt: skip
    curve = tmp_path / "c.csv"
    curve.write_text("t,T\n0,25\n")
    one_line(cli("calibrate", str(curve), "--rail", "bench-a", "--power", "2", *url), 2,
             "time_s and temp_c")  # fmt: skip
    curve.write_text("time_s,temp_c\n0,25\n1,warm\n")
    one_line(cli("calibrate", str(curve), "--rail", "bench-a", "--power", "2", *url), 2,
             "line 3", "is not a number")  # fmt: skip


def test_service_refusals(served: str) -> None:
    url = ("--url", served)
    one_line(cli("status", "nope", *url), 1, "404", "nope")
    one_line(cli("forecast", "bench-a", "--drop", "9", *url), 1, "422")
    one_line(cli("screening", "nope", "--depth", "2", *url), 1, "404")


def test_keys_mode_says_to_set_a_key(tmp_path: Path) -> None:
    port = free_port()
    proc = start_server(tmp_path, port, {"PHASEWARD_AUTH_MODE": "keys"})
    try:
        one_line(cli("status", "bench-a", "--url", f"http://127.0.0.1:{port}"), 1, "401",
                 "PHASEWARD_KEY")  # fmt: skip
    finally:
        proc.terminate()
        proc.wait(timeout=20)


def test_output_fits_80_columns(served: str) -> None:
    for args in (("status", "bench-a"), ("events",), ("screening", "bench-a", "--depth", "2"),
                 ("forecast", "bench-a", "--load", "60")):  # fmt: skip
        done = cli(*args, "--url", served)
        assert done.returncode == 0, done.stderr
        wide = [line for line in done.stdout.splitlines() if len(line) > 80]
        assert not wide, (args, wide)
    events = cli("events", "--url", served).stdout
    assert "phase.isolated  phase 2" in events


def test_demo_never_deletes_what_it_did_not_create(tmp_path: Path) -> None:
    # A user's own service data holding a rail that happens to be called demo-core.
    mine = tmp_path / "mine"
    port = free_port()
    proc = start_server(mine, port)
    try:
        theirs = rail_spec(id="demo-core", name="my own rail")
        httpx.post(f"http://127.0.0.1:{port}/v1/rails", json=theirs).raise_for_status()
    finally:
        proc.terminate()
        proc.wait(timeout=20)
    done = cli("demo", "--once", "--port", str(free_port()), "--data-dir", str(mine))
    assert "deletes nothing it did not create" in one_line(done, 1, "--data-dir")
    with sqlite3.connect(mine / "phaseward.db") as db:
        specs = db.execute("SELECT spec FROM rail_versions WHERE rail_id = 'demo-core'")
        names = [json.loads(row[0])["name"] for row in specs]
    assert names == ["my own rail"]
    assert not (mine / DEMO_MARK).exists()
    # By default the demo keeps to a directory of its own, and runs there again and again.
    for _ in range(2):
        done = cli("demo", "--once", "--port", str(free_port()), cwd=tmp_path)
        assert done.returncode == 0, done.stderr
    assert (tmp_path / "phaseward-demo" / DEMO_MARK).exists()
    assert not (tmp_path / "phaseward-data").exists()
