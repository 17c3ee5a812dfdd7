"""CSV sample bodies (``text/csv``): one row per sample, typed into the columnar arrays.

The header names the columns, in any order: per-sample fields by their names (``seq``,
``time``, ``vin_v``, ...), per-phase fields as ``name[i]`` with ``i`` the phase index
(``current_a[0]``, ``temp_c[0]``, ``breaker_tripped[0]``, ...). An empty cell is "not given";
flags are ``0`` or ``1``; PMBus words are decimal integers; ``time`` is epoch seconds or RFC
3339 with an offset. The rules are those of the JSON columns (``schemas/columns.py``);
refusals name the cell by data row (from 0) and header: ``[k].vin_v``, ``[k].temp_c[3]``, and
``[k].phase[3]`` for a reading as a whole.
"""

from __future__ import annotations

import csv
import io
import re

import numpy as np
import numpy.typing as npt

from phaseward.api.schemas.columns import (
    PHASE_COLUMNS,
    SAMPLE_COLUMNS,
    Column,
    Refusal,
    Typed,
    build,
    check_times,
    first_cell,
    in_bounds,
    nothing,
)
from phaseward.api.schemas.samples import PHASE_INDEX_RANGE, epoch_seconds
from phaseward.errors import BadRequest, InvalidInput, PayloadTooLarge
from phaseward.monitor.telemetry import NO_WORD, CellName, IncomingSamples

CSV = "text/csv"
_PHASE_HEADER = re.compile(r"([a-z_0-9]+)\[([0-9]{1,6})\]")
Text = npt.NDArray[np.str_]


def parse_csv(body: bytes, *, max_items: int) -> IncomingSamples:
    """A CSV body as the monitor's long form, or the ``Refusal`` of its first bad cell."""
    try:
        rows = [r for r in csv.reader(io.StringIO(body.decode("utf-8-sig"))) if r]
    except (UnicodeDecodeError, csv.Error) as err:
        raise BadRequest(f"body is not CSV text: {err}", field="body") from err
    if len(rows) < 2:
        raise BadRequest(
            "no samples in the body (a header row, then one row per sample)", field="body"
        )
    n = len(rows) - 1
    if n > max_items:
        raise PayloadTooLarge(f"{n} samples exceed the limit of {max_items}", field="body")
    try:
        return _from_rows(rows[0], rows[1:])
    except InvalidInput as err:
        raise Refusal(err, n) from None


def _header(header: list[str]) -> tuple[dict[str, int], dict[tuple[str, int], int]]:
    """Where each per-sample field and each (per-phase field, phase) is."""
    sample_names = {c.name for c in SAMPLE_COLUMNS}
    phase_names = {c.name for c in PHASE_COLUMNS}
    per_sample: dict[str, int] = {}
    per_phase: dict[tuple[str, int], int] = {}
    for at, text in enumerate(header):
        name = text.strip()
        match = _PHASE_HEADER.fullmatch(name)
        if name in sample_names:
            key: str | tuple[str, int] = name
        elif match is not None and match[1] in phase_names:
            key = (match[1], int(match[2]))
            if key[1] > PHASE_INDEX_RANGE[1]:
                raise InvalidInput(
                    f"phase index {key[1]} is beyond {PHASE_INDEX_RANGE[1]}", field=name
                )
        else:
            raise InvalidInput("unknown column", field=name)
        if key in per_sample or key in per_phase:
            raise InvalidInput("column appears twice", field=name)
        if isinstance(key, str):
            per_sample[key] = at
        else:
            per_phase[key] = at
    return per_sample, per_phase


def _from_rows(header: list[str], data: list[list[str]]) -> IncomingSamples:
    widths = np.fromiter(map(len, data), dtype=np.int64, count=len(data))
    if (widths != len(header)).any():
        k = int(np.argmax(widths != len(header)))
        raise InvalidInput(f"row has {widths[k]} cells, the header {len(header)}", field=f"[{k}]")
    where_sample, where_phase = _header(header)
    phases = sorted({i for _, i in where_phase})
    if not phases:
        raise InvalidInput("give at least one per-phase column, e.g. current_a[0]", field="body")
    cells: Text = np.array(data, dtype=str)
    n, p = cells.shape[0], len(phases)
    slot = {i: j for j, i in enumerate(phases)}

    def cell(k: int, j: int | None, name: str | None) -> str:
        if j is None:
            return f"[{k}].{name}"
        i = phases[j]
        return f"[{k}].phase[{i}]" if name in (None, "index") else f"[{k}].{name}[{i}]"

    empty = np.zeros(n, dtype=cells.dtype)
    per_sample = {
        c.name: _typed_text(
            c, cells[:, where_sample[c.name]] if c.name in where_sample else empty, cell
        )
        for c in SAMPLE_COLUMNS
    }
    per_phase = {}
    for c in PHASE_COLUMNS:
        strings = np.zeros((n, p), dtype=cells.dtype)
        for (name, i), at in where_phase.items():
            if name == c.name:
                strings[:, slot[i]] = cells[:, at]
        per_phase[c.name] = _typed_text(c, strings, cell)
    index = Typed(np.array(phases, dtype=np.int64), np.ones(p, dtype=bool))
    return build(per_sample, index, per_phase, cell)


def _typed_text(column: Column, strings: Text, cell: CellName) -> Typed:
    """One field's cells as a typed array, within its bounds, or the refusal of the first bad
    one. Parsed by numpy for the whole field; per cell only to name a refusal."""
    given = strings != ""
    if not given.any() and not column.required:
        return Typed(nothing(column, strings.shape), given)
    if column.required and not given.all():
        k, j = first_cell(~given)
        raise InvalidInput("a value is required", field=cell(k, j, column.name))
    if column.kind == "bool":
        bad = ~np.isin(strings, ("", "0", "1"))
        if bad.any():
            k, j = first_cell(bad)
            raise InvalidInput("must be 0 or 1", field=cell(k, j, column.name))
        ones = strings == "1"
        return Typed(ones, ones)
    if column.kind == "time":
        try:
            t = strings.astype(np.float64)
        except ValueError:
            t = np.array([_epoch(s, k, cell) for k, s in enumerate(strings.tolist())])
        check_times(t, lambda k: cell(k, None, "time"))
        return Typed(t, given)
    kind = np.int64 if column.kind == "int" else np.float64
    values: npt.NDArray[np.generic]
    try:
        values = np.where(given, strings, "-1" if column.kind == "int" else "nan").astype(kind)
    except (ValueError, OverflowError):
        values = _one_by_one(column, strings, given, cell)
    return in_bounds(column, Typed(values, given), cell)


def _one_by_one(
    column: Column, strings: Text, given: npt.NDArray[np.bool_], cell: CellName
) -> npt.NDArray[np.generic]:
    """Parse cell by cell, on the way to a refusal: the first cell that is no number is
    refused here; integers beyond int64 are kept out of the bounds for ``in_bounds``."""
    parse = int if column.kind == "int" else float
    lo, hi = column.bounds or (0, 0)
    out = []
    for flat, text in enumerate(strings.ravel().tolist()):
        if not text:
            out.append(NO_WORD if column.kind == "int" else np.nan)
            continue
        try:
            value = parse(text)
        except ValueError:
            k, j = divmod(flat, strings.shape[1]) if strings.ndim == 2 else (flat, None)
            what = "an integer" if column.kind == "int" else "a number"
            raise InvalidInput(
                f"must be {what}, not '{text}'", field=cell(k, j, column.name)
            ) from None
        out.append(min(max(value, lo - 1), hi + 1) if column.kind == "int" else value)
    return np.array(out, dtype=np.int64 if column.kind == "int" else np.float64).reshape(
        strings.shape
    )


def _epoch(text: str, k: int, cell: CellName) -> float:
    """A cell of a time column that is not all numbers: a number (its range checked with the
    others) or RFC 3339."""
    try:
        return float(text)
    except ValueError:
        pass
    try:
        return epoch_seconds(text)
    except ValueError as err:
        raise InvalidInput(str(err), field=cell(k, None, "time")) from None
