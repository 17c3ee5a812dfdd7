"""The README's settings table names every setting of the settings class, with its default."""

from __future__ import annotations

import re
from pathlib import Path

from phaseward.settings import Settings

README = Path(__file__).resolve().parents[2] / "README.md"
ROW = re.compile(r"^\| `PHASEWARD_([A-Z0-9_]+)` \| (.+?) \| (.+) \|$")


def readme_rows() -> dict[str, str]:
    text = README.read_text()
    section = text[text.index("## Settings") :]
    section = section[: section.index("\n## ", 1)]
    return {m[1].lower(): m[2] for line in section.splitlines() if (m := ROW.match(line))}


def shown(default: object) -> str:
    if default is None:
        return "(none)"
    if default == "":
        return "(empty)"
    return f"`{default}`"


def test_settings_table_matches_the_settings_class() -> None:
    rows = readme_rows()
    fields = Settings.model_fields
    assert sorted(rows) == sorted(fields), "README settings table and Settings differ"
    for name, field in fields.items():
        assert rows[name] == shown(field.default), f"PHASEWARD_{name.upper()} default"
