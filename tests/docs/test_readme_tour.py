"""The README's tour and command-line sections, run as written against a fresh demo.

Every ``sh`` block of the two sections runs in bash (``set -euo pipefail``) from a scratch
directory holding a copy of ``examples/``, with the demo serving on a free loopback port (the
README's ``localhost:8470`` is rewritten to it) and a data directory of its own. ``phaseward``
and ``python3`` are this interpreter's; ``curl`` is the real one behind a recorder that fails
on any HTTP status of 400 or more and keeps each answer, whose shape is then checked.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
import textwrap
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from tests.servers import free_port

pytestmark = pytest.mark.e2e

REPO = Path(__file__).resolve().parents[2]
SECTIONS = ("## A short tour", "## Command line")

# What each answer the tour asks for must hold: (method, path pattern) -> a check.
SHAPES: dict[tuple[str, str], Any] = {
    ("POST", r"/v1/rails"): lambda a: a["id"] == "bench-6ph" and a["version"] == 1,
    ("POST", r"/v1/rails/demo-core/samples"): lambda a: a["stored"] >= 1 and not a["rejected"],
    ("GET", r"/v1/rails/demo-core/status"): lambda a: (
        a["condition"] == "degraded" and a["capacity"]["capacity_a"] > 0 and "caution" in a
    ),
    ("GET", r"/v1/rails/demo-core/events\?severity=critical"): lambda a: (
        a["items"] and {e["severity"] for e in a["items"]} == {"critical"}
    ),
    ("GET", r"/v1/rails/demo-core/events\?kind=phase.isolated&limit=1"): lambda a: (
        a["items"][0]["phase"] == 2
    ),
    ("GET", r"/v1/events"): lambda a: a.startswith("id,time,rail_id"),
    ("GET", r"/openapi.json"): lambda a: "/v1/rails" in a["paths"],
    ("POST", r"/v1/events/\d+/ack"): lambda a: (
        a["kind"] == "phase.isolated" and a["acked_by"] == "bench operator"
    ),
    ("GET", r"/v1/rails/demo-core/screening\?depth=2"): lambda a: (
        a["depth"] == 2 and len(a["cases"]) == 10 and "caution" in a  # 5 active phases, pairs
    ),
    ("POST", r"/v1/rails/demo-core/forecast"): lambda a: len(a["time_s"]) > 1 and "caution" in a,
    ("GET", r"/v1/rails/demo-core/ratings\?duration_s=60&duration_s=600"): lambda a: (
        {60.0, 600.0} <= set(a["durations_s"])
        and a["cases"][0]["lose_phases"] == []
        and "caution" in a
    ),
    ("GET", r"/v1/rails/demo-core/reliability\?hours=43800"): lambda a: (
        0 < a["present"]["survival_probability"] < 1
    ),
    ("POST", r"/v1/tools/breaker-stress"): lambda a: a["power_w"] == pytest.approx(300.0),
}

CURL = """
    import json, os, subprocess, sys
    args = sys.argv[1:]
    done = subprocess.run(["{curl}", *args, "-w", "\\n%{{http_code}}"], capture_output=True)
    body, _, status = done.stdout.decode().rpartition("\\n")
    sys.stdout.write(body)
    method = "POST" if "POST" in args else "GET"
    url = next(a for a in args if "127.0.0.1:" in a)
    with open(os.environ["TOUR_LOG"], "a") as log:
        log.write(json.dumps({{"method": method, "url": url, "status": status, "body": body}}))
        log.write("\\n")
    sys.exit(done.returncode or (22 if not status.isdigit() or int(status) >= 400 else 0))
"""


def blocks() -> list[str]:
    text = (REPO / "README.md").read_text()
    found = []
    for title in SECTIONS:
        section = text[text.index(title) :]
        section = section[: section.index("\n## ", 1)]
        found += re.findall(r"```sh\n(.*?)```", section, re.S)
    return found


@pytest.fixture
def demo(tmp_path: Path) -> Iterator[tuple[Path, int]]:
    """A fresh demo serving on a free port from a scratch directory with the examples."""
    shutil.copytree(REPO / "examples", tmp_path / "examples")
    port = free_port()
    env = os.environ | {"PHASEWARD_LOG_LEVEL": "warning"}
    for name in ("PHASEWARD_DATABASE_URL", "PHASEWARD_DATA_DIR", "PHASEWARD_URL"):
        env.pop(name, None)
    proc = subprocess.Popen(
        [sys.executable, "-m", "phaseward.cli", "demo", "--pace", "0", "--port", str(port)],
        cwd=tmp_path, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )  # fmt: skip
    try:
        assert proc.stdout is not None
        deadline = time.monotonic() + 600
        said = []
        for line in proc.stdout:  # the scenario's report, then "The service keeps running"
            said.append(line)
            if "keeps running" in line:
                break
            assert time.monotonic() < deadline, "the demo took too long"
        else:
            pytest.fail("the demo ended before serving: " + "".join(said[-20:]))
        yield tmp_path, port
    finally:
        proc.send_signal(signal.SIGINT)  # Ctrl-C, as the README says
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        if proc.stdout is not None:
            proc.stdout.close()


def shims(where: Path) -> Path:
    """``phaseward`` and ``python3`` of this interpreter, ``curl`` behind the recorder."""
    real_curl = shutil.which("curl")
    assert real_curl is not None, "the tour needs curl"
    bin_dir = where / "bin"
    bin_dir.mkdir()
    (bin_dir / "phaseward").write_text(
        f'#!/bin/sh\nexec "{sys.executable}" -m phaseward.cli "$@"\n'
    )
    (bin_dir / "python3").write_text(f'#!/bin/sh\nexec "{sys.executable}" "$@"\n')
    (bin_dir / "curl").write_text(
        f"#!{sys.executable}\n" + textwrap.dedent(CURL.format(curl=real_curl))
    )
    for shim in bin_dir.iterdir():
        shim.chmod(0o755)
    return bin_dir


def test_readme_tour_and_commands_run_as_written(demo: tuple[Path, int]) -> None:
    where, port = demo
    bin_dir = shims(where)
    log = where / "answers.jsonl"
    env = os.environ | {
        "PATH": f"{bin_dir}{os.pathsep}{os.environ['PATH']}",
        "PHASEWARD_URL": f"http://127.0.0.1:{port}",
        "TOUR_LOG": str(log),
        "COLUMNS": "80",
    }
    env.pop("PHASEWARD_KEY", None)
    found = blocks()
    assert len(found) >= 4
    printed = []
    for block in found:
        script = block.replace("localhost:8470", f"127.0.0.1:{port}")
        done = subprocess.run(
            ["bash", "-euo", "pipefail", "-c", script], cwd=where, env=env, capture_output=True,
            text=True, timeout=600,
        )  # fmt: skip
        assert done.returncode == 0, f"{block}\n-> exit {done.returncode}: {done.stderr}"
        assert "Traceback" not in done.stderr, done.stderr
        printed.append(done.stdout)

    answers = [json.loads(line) for line in log.read_text().splitlines()]
    seen = set()
    for answer in answers:
        path = answer["url"].split(f"127.0.0.1:{port}", 1)[1]
        matches = [
            check for (method, pattern), check in SHAPES.items()
            if method == answer["method"] and re.fullmatch(pattern, path)
        ]  # fmt: skip
        assert len(matches) == 1, f"no expected shape for {answer['method']} {path}"
        seen.add(next(key for key, check in SHAPES.items() if check is matches[0]))
        body = answer["body"]
        parsed = body if body.startswith("id,") else json.loads(body)
        assert matches[0](parsed), f"{answer['method']} {path} answered {body[:500]}"
    assert seen == set(SHAPES), f"the tour no longer asks {set(SHAPES) - seen}"

    commands = printed[-1]
    for said in ("demo-core v1: degraded", "N-2 NOT secure", "hottest junction degC",
                 "Pareto front", "applied as version 2 of demo-core"):  # fmt: skip
        assert said in commands, said
    assert len(re.findall(r"^#\d+ +[-\d]+ [:\d]+  \w+ +demo-core  ", commands, re.M)) == 5
    assert all(len(line) <= 80 for line in commands.splitlines())
    assert (where / "front.svg").read_text().startswith("<svg")
