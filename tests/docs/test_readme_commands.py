"""The README's two commands: the install uses a project virtual environment (so it works
where the system Python forbids global installs), and CI runs the test command as written."""

from __future__ import annotations

import re
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def two_commands() -> list[str]:
    text = (REPO / "README.md").read_text()
    section = text[text.index("## Two commands") :]
    section = section[: section.index("\n## ", 1)]
    return [b.strip() for b in re.findall(r"```sh\n(.*?)```", section, re.S)]


def test_install_uses_a_project_venv_and_ci_runs_the_test_command_as_written() -> None:
    install, test = two_commands()
    assert install.startswith("python3 -m venv .venv && .venv/bin/pip install ")
    assert install.endswith(".venv/bin/phaseward demo")
    ci = [
        line.strip()
        for line in (REPO / ".ci" / "run").read_text().splitlines()
        if line.strip() and not line.lstrip().startswith("#")
    ]
    assert ci[-1] == test
    check = (REPO / "scripts" / "check.sh").read_text()
    assert "python3 -m venv .venv" in check
    assert re.search(r"^python3 -m (pip|pytest)", check, re.M) is None  # nothing outside .venv
