"""Samples as one columnar body: one array per field, one (samples x phases) matrix per
phase field, which the service checks as arrays instead of object by object; and the same
as CSV."""

from __future__ import annotations

import csv
import io
from collections.abc import Sequence
from typing import Any

COLUMNS_JSON = "application/vnd.phaseward.columns+json"
JsonObject = dict[str, Any]


def to_columns(samples: Sequence[JsonObject]) -> JsonObject | None:
    """The samples (as JSON objects) as one columnar body: per-sample fields as arrays, per-phase
    fields as matrices over the phases any sample reports (``phases.index``), ``null`` where a
    sample does not give a value. ``None`` when the samples do not fit columns (a reading with
    no integer index, a phase twice in one sample, a reading that gives nothing): such a batch
    is sent as objects, so that the service names what is wrong in the caller's terms."""
    rows: list[dict[int, JsonObject]] = []
    for item in samples:
        phases = item.get("phases")
        if not isinstance(phases, list) or not phases:
            return None
        by_index: dict[int, JsonObject] = {}
        for reading in phases:
            if not isinstance(reading, dict):
                return None
            index = reading.get("index")
            if not isinstance(index, int) or isinstance(index, bool) or index in by_index:
                return None
            if not any(
                v is not None and v is not False for k, v in reading.items() if k != "index"
            ):
                return None  # nothing but the index: a refusal, not a phase left out
            by_index[index] = reading
        rows.append(by_index)
    indexes = sorted({i for row in rows for i in row})
    sample_fields = _fields(samples, skip="phases")
    phase_fields = _fields([r for row in rows for r in row.values()], skip="index")
    body: JsonObject = {name: [item.get(name) for item in samples] for name in sample_fields}
    matrices: JsonObject = {"index": indexes}
    for name in phase_fields:
        matrices[name] = [[row[i].get(name) if i in row else None for i in indexes] for row in rows]
    body["phases"] = matrices
    return body


def _fields(objects: Sequence[JsonObject], *, skip: str) -> list[str]:
    """The keys any of ``objects`` gives a value for, in first-seen order."""
    seen: dict[str, None] = {}
    for obj in objects:
        for key, value in obj.items():
            if key != skip and value is not None:
                seen.setdefault(key)
    return list(seen)


def to_csv(columns: JsonObject) -> str:
    """A columnar body as the service's CSV form (``text/csv``): per-sample fields by name,
    per-phase fields as ``name[i]`` for phase ``i``, an empty cell for null, flags as 0/1."""
    matrices = columns["phases"]
    first = next(m for name, m in matrices.items() if name != "index")
    index = matrices.get("index", range(len(first[0])))
    header, cells = [], []
    for name, values in columns.items():
        if name != "phases":
            header.append(name)
            cells.append(values)
    for name, matrix in matrices.items():
        if name != "index":
            header += [f"{name}[{i}]" for i in index]
            cells += [[row[j] for row in matrix] for j in range(len(index))]
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    writer.writerows([_cell(v) for v in row] for row in zip(*cells, strict=True))
    return out.getvalue()


def _cell(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "1" if value else "0"
    return repr(value) if isinstance(value, float) else str(value)
