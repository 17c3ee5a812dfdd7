"""Columnar sample bodies: one array per field, checked with numpy instead of per object.

The JSON form (``application/vnd.phaseward.columns+json``)::

    {"seq": [n ints], "time": [n], "vin_v": [n], ..., "ambient_c": [n],
     "phases": {"index": [p ints], "current_a": [[p numbers] x n], "temp_c": [...], ...}}

Field names are those of a sample object (``SampleIn``) and of its phase readings
(``PhaseReading``); a per-phase field is an (n_samples, n_phases) matrix, one row per sample,
its columns the phases listed in ``phases.index`` (default 0..p-1). ``null`` is "not given"
(for a flag: false). A cell (sample, phase) with nothing given is a phase that sample does not
report; a cell with anything given is a phase reading under the object's rules. The CSV form
(``api/schemas/columns_csv.py``) is typed into the same arrays.

Bounds and rules are the per-object schema's, taken from ``schemas/samples.py``; a body is
refused whole (422) at its first bad cell: fields in the order of ``SAMPLE_COLUMNS``, then
``phases.index``, then ``PHASE_COLUMNS``, each by sample then phase, then the rules across
fields. Cells are named ``vin_v[k]``, ``phases.temp_c[k][j]``, ``phases[k][j]`` (the reading
as a whole) and ``phases.index[j]``.
"""

from __future__ import annotations

import itertools
import json
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from phaseward.api.schemas.common import CELSIUS_RANGE
from phaseward.api.schemas.samples import (
    AMPS_RANGE,
    BYTE_RANGE,
    EPOCH_MAX_S,
    INPUT_AMPS_RANGE,
    MAX_PHASES,
    PHASE_INDEX_RANGE,
    SENSE_VOLTS_RANGE,
    SEQ_RANGE,
    STATUS_WORDS,
    VOLTS_RANGE,
    WORD_RANGE,
    epoch_seconds,
    reading_flags,
)
from phaseward.errors import BadRequest, InvalidInput, PayloadTooLarge
from phaseward.monitor.telemetry import FLAG_NAMES, NO_WORD, CellName, IncomingSamples

COLUMNS_JSON = "application/vnd.phaseward.columns+json"
Kind = Literal["int", "float", "bool", "time"]
Array = npt.NDArray[Any]


@dataclass(frozen=True)
class Column:
    name: str
    kind: Kind
    bounds: tuple[float, float] | None = None
    required: bool = False
    description: str = ""


SAMPLE_COLUMNS = (
    Column("seq", "int", SEQ_RANGE, required=True),
    Column("time", "time", required=True, description="epoch seconds or RFC 3339 with offset"),
    Column("vin_v", "float", VOLTS_RANGE, description="else every phase's read_vin"),
    Column("vout_v", "float", VOLTS_RANGE, description="else every phase's read_vout"),
    Column("iout_a", "float", AMPS_RANGE),
    Column("iin_a", "float", INPUT_AMPS_RANGE, description="input current, A"),
    Column("ambient_c", "float", CELSIUS_RANGE),
)
CURRENTS = ("current_a", "sense_v", "read_iout")
PHASE_COLUMNS = (
    Column("current_a", "float", AMPS_RANGE),
    Column("sense_v", "float", SENSE_VOLTS_RANGE, description="voltage across the DCR, V"),
    Column("read_iout", "int", WORD_RANGE, description="PMBus READ_IOUT, LINEAR11"),
    Column("temp_c", "float", CELSIUS_RANGE),
    Column("read_temperature_1", "int", WORD_RANGE, description="instead of temp_c"),
    *(Column(name, "bool") for name in FLAG_NAMES),
    Column("status_word", "int", WORD_RANGE),
    Column("read_vin", "int", WORD_RANGE),
    Column("read_iin", "int", WORD_RANGE),
    Column("read_vout", "int", WORD_RANGE),
    *(Column(name, "int", BYTE_RANGE) for name in STATUS_WORDS[1:]),
)
INDEX = Column("index", "int", PHASE_INDEX_RANGE, required=True)


class Refusal(Exception):
    """A body refused at its first bad item or cell: the error recorded, the count of samples
    the body carried and what the client is answered (by default the error)."""

    def __init__(self, error: InvalidInput, samples: int, answer: Exception | None = None) -> None:
        super().__init__(error.detail)
        self.error, self.samples = error, samples
        self.answer = error if answer is None else answer


class NonFinite(str):
    """A NaN or Infinity token of the JSON text, kept to be refused at its cell."""


def json_cell(k: int, slot: int | None, name: str | None) -> str:
    """The name of a cell of a columnar JSON body (see the module docstring)."""
    if slot is None:
        return f"{name}[{k}]"
    if name == "index":
        return f"phases.index[{slot}]"
    return f"phases[{k}][{slot}]" if name is None else f"phases.{name}[{k}][{slot}]"


@dataclass(frozen=True)
class Typed:
    """One field's values as an array (float: NaN, int: NO_WORD where not given) and where
    they were given, of shape (n,) per sample or (n, p) per phase."""

    values: Array
    given: npt.NDArray[np.bool_]


def first_cell(mask: npt.NDArray[np.bool_]) -> tuple[int, int | None]:
    """(sample, slot) of the first True of a (n,) or (n, p) mask (slot None for (n,))."""
    at = np.argwhere(mask)[0]
    return int(at[0]), (int(at[1]) if at.shape[0] > 1 else None)


def in_bounds(column: Column, typed: Typed, cell: CellName) -> Typed:
    """``typed`` if every given value is finite and within the column's bounds."""
    if column.kind in ("bool", "time") or column.bounds is None:
        return typed
    lo, hi = column.bounds
    v = typed.values
    finite = np.isfinite(v) if column.kind == "float" else np.ones(v.shape, dtype=bool)
    bad = typed.given & ~(finite & (v >= lo) & (v <= hi))
    if bad.any():
        k, j = first_cell(bad)
        value = (v[k] if j is None else v[k, j]).item()
        detail = (
            f"{value} is not a finite number"
            if column.kind == "float" and not np.isfinite(value)
            else f"must be within {lo:g}..{hi:g}, not {value}"
        )
        raise InvalidInput(detail, field=cell(k, j, column.name))
    return typed


def check_times(t_s: npt.NDArray[np.float64], where: Callable[[int], str]) -> None:
    """Epoch seconds as the object schema takes them (the refusal in its words)."""
    bad = ~((t_s > 0.0) & (t_s < EPOCH_MAX_S))
    if bad.any():
        k = int(np.argmax(bad))
        try:
            epoch_seconds(float(t_s[k]))
        except ValueError as err:
            raise InvalidInput(str(err), field=where(k)) from None


def build(
    per_sample: dict[str, Typed], index: Typed, per_phase: dict[str, Typed], cell: CellName
) -> IncomingSamples:
    """The rules across fields, then the long form the monitor takes (one row per reading,
    by sample then phase, as the object form lists them)."""
    phases = index.values
    for j in range(1, phases.shape[0]):  # p <= 64: a check per phase, not per sample
        if phases[j] in phases[:j]:
            raise InvalidInput(f"phase {int(phases[j])} is listed twice", field=cell(0, j, "index"))
    seq = per_sample["seq"].values
    _, first, counts = np.unique(seq, return_index=True, return_counts=True)
    if (counts > 1).any():
        twice = int(seq[first[counts > 1][0]])
        k = int(np.nonzero(seq == twice)[0][1])
        raise InvalidInput(
            f"sequence number {twice} appears twice in the batch", field=cell(k, None, "seq")
        )
    present = np.logical_or.reduce([t.given for t in per_phase.values()])
    currents = np.sum([per_phase[name].given for name in CURRENTS], axis=0)
    both_temps = per_phase["temp_c"].given & per_phase["read_temperature_1"].given
    bad = present & ((currents != 1) | both_temps)
    if bad.any():
        k, j = (int(x) for x in np.argwhere(bad)[0])
        detail = (
            "give exactly one of current_a, sense_v or read_iout"
            if currents[k, j] != 1
            else "give temp_c or read_temperature_1, not both"
        )
        raise InvalidInput(detail, field=cell(k, j, None))
    empty = ~present.any(axis=1)
    if empty.any():
        raise InvalidInput(
            "a sample needs at least one phase reading",
            field=cell(int(np.argmax(empty)), None, "phases"),
        )
    item, slot = np.nonzero(present)
    reading = {name: t.values[present] for name, t in per_phase.items()}
    return IncomingSamples(
        seq=seq.astype(np.int64),
        t_s=per_sample["time"].values,
        vin_v=per_sample["vin_v"].values,
        vout_v=per_sample["vout_v"].values,
        iout_a=per_sample["iout_a"].values,
        iin_a=per_sample["iin_a"].values,
        ambient_c=per_sample["ambient_c"].values,
        item=item.astype(np.int64),
        slot=slot.astype(np.int64),
        phase=phases[slot].astype(np.int64),
        current_a=reading["current_a"],
        sense_v=reading["sense_v"],
        iout_word=reading["read_iout"],
        vin_word=reading["read_vin"],
        iin_word=reading["read_iin"],
        vout_word=reading["read_vout"],
        temp_word=reading["read_temperature_1"],
        temp_c=reading["temp_c"],
        flags=reading_flags(
            np.column_stack([reading[name] for name in FLAG_NAMES]).reshape(-1, len(FLAG_NAMES)),
            np.column_stack([reading[name] for name in STATUS_WORDS]).reshape(
                -1, len(STATUS_WORDS)
            ),
        ),
        cell=cell,
    )


# ---------------------------------------------------------------- the JSON form

_TYPES: dict[Kind, tuple[type, ...]] = {
    "int": (int,), "float": (int, float), "bool": (bool,), "time": (int, float, str)
}  # fmt: skip
_NAMES = {"int": "an integer", "float": "a number", "bool": "true or false", "time": "a time"}


def _wrong(column: Column, value: object, field: str) -> InvalidInput:
    if isinstance(value, NonFinite):
        return InvalidInput(f"{value} is not a finite number", field=field)
    if value is None:
        return InvalidInput("a value is required", field=field)
    got = type(value).__name__
    return InvalidInput(f"must be {_NAMES[column.kind]}, not {got}", field=field)


def _typed_json(column: Column, cells: list[Any], shape: tuple[int, ...], cell: CellName) -> Typed:
    """The cells (flattened, by sample then phase) of one field as a typed array; refused at
    the first cell of a wrong type. Types are checked per distinct type, not per cell."""
    allowed = _TYPES[column.kind] + (() if column.required else (type(None),))
    if not set(map(type, cells)) <= set(allowed):
        # Only on the way to a refusal: find the first bad cell.
        at = next(i for i, v in enumerate(cells) if type(v) not in allowed)
        k, j = divmod(at, shape[1]) if len(shape) == 2 else (at, None)
        raise _wrong(column, cells[at], cell(k, j, column.name))
    if column.kind == "bool":
        values: Array = np.array(cells, dtype=bool).reshape(shape)
        return Typed(values, values)
    if column.kind == "int" and column.required:  # exact: seq goes beyond float64's integers
        try:
            ints = np.array(cells, dtype=np.int64)
        except OverflowError:  # beyond int64, so beyond the bounds: keep it out of them
            lo, hi = column.bounds or SEQ_RANGE
            ints = np.array([min(max(v, lo - 1), hi + 1) for v in cells], dtype=np.int64)
        return Typed(ints.reshape(shape), np.ones(shape, dtype=bool))
    if column.kind == "time" and str in set(map(type, cells)):
        t = np.array([_epoch_or_refusal(v, at, shape, cell) for at, v in enumerate(cells)])
        return Typed(t.reshape(shape), np.ones(shape, dtype=bool))
    try:
        floats = np.array(cells, dtype=np.float64).reshape(shape)  # None -> NaN
    except OverflowError:  # an integer beyond float64, so beyond any bound: keep it out
        floats = np.array([_clamped(v) for v in cells], dtype=np.float64).reshape(shape)
    given = ~np.isnan(floats)  # NaN tokens are NonFinite, so NaN here is null
    if column.kind == "int":
        typed = in_bounds(column, Typed(floats, given), cell)
        return Typed(np.where(given, typed.values, NO_WORD).astype(np.int64), given)
    return Typed(floats, given)


def _clamped(value: float | None) -> float | None:
    return None if value is None else min(max(value, -1e300), 1e300)


def _epoch_or_refusal(value: Any, at: int, shape: tuple[int, ...], cell: CellName) -> float:
    try:
        return epoch_seconds(value)
    except ValueError as err:
        raise InvalidInput(str(err), field=cell(at, None, "time")) from None


def nothing(column: Column, shape: tuple[int, ...]) -> Array:
    """The values of a field not given at all."""
    if column.kind == "bool":
        return np.zeros(shape, dtype=bool)
    return np.full(shape, NO_WORD) if column.kind == "int" else np.full(shape, np.nan)


def _column_json(
    column: Column, raw: object, shape: tuple[int, ...], cell: CellName, field: str
) -> Typed:
    if raw is None:
        if column.required:
            raise InvalidInput("a value is required", field=field)
        return Typed(nothing(column, shape), np.zeros(shape, dtype=bool))
    n = shape[0]
    if not isinstance(raw, list) or len(raw) != n:
        raise InvalidInput(f"must be an array of {n} values, one per sample", field=field)
    if len(shape) == 2:
        p = shape[1]
        if not (set(map(type, raw)) == {list} and set(map(len, raw)) == {p}):
            k = next(k for k, r in enumerate(raw) if not isinstance(r, list) or len(r) != p)
            raise InvalidInput(
                f"each row must be an array of {p} values, one per phase", field=f"{field}[{k}]"
            )
        cells: list[Any] = list(itertools.chain.from_iterable(raw))
    else:
        cells = raw
    typed = _typed_json(column, cells, shape, cell)
    if column.kind == "time":
        check_times(typed.values, lambda k: cell(k, None, "time"))
        return typed
    return in_bounds(column, typed, cell)


def parse_columns(body: bytes, *, max_items: int) -> IncomingSamples:
    """A columnar JSON body as the monitor's long form, or the ``Refusal`` of its first bad
    cell (``BadRequest`` if it is not JSON, ``PayloadTooLarge`` beyond ``max_items``)."""
    try:
        doc = json.loads(body, parse_constant=NonFinite)
    except ValueError as err:
        raise BadRequest(f"body is not JSON: {err}", field="body") from err
    except RecursionError:
        raise BadRequest("body is JSON nested too deeply to be columns", field="body") from None
    seq = doc.get("seq") if isinstance(doc, dict) else None
    n = len(seq) if isinstance(seq, list) else 1
    if n > max_items:
        raise PayloadTooLarge(f"{n} samples exceed the limit of {max_items}", field="body")
    try:
        return _columns(doc)
    except InvalidInput as err:
        raise Refusal(err, max(n, 1)) from None


def _columns(doc: object) -> IncomingSamples:
    if not isinstance(doc, dict):
        raise InvalidInput("a columnar body is one object of arrays", field="body")
    known = {c.name for c in SAMPLE_COLUMNS} | {"phases"}
    for name in doc:
        if name not in known:
            raise InvalidInput("unknown field", field=name)
    seq = doc.get("seq")
    if not isinstance(seq, list) or not seq:
        raise InvalidInput("must be an array of at least one sequence number", field="seq")
    n = len(seq)
    per_sample = {
        c.name: _column_json(c, doc.get(c.name), (n,), json_cell, c.name) for c in SAMPLE_COLUMNS
    }
    matrices = doc.get("phases")
    if not isinstance(matrices, dict):
        raise InvalidInput("must be an object of per-phase arrays", field="phases")
    names = {c.name for c in PHASE_COLUMNS} | {"index"}
    for name in matrices:
        if name not in names:
            raise InvalidInput("unknown field", field=f"phases.{name}")
    index = _index_json(matrices)
    p = index.values.shape[0]
    per_phase = {
        c.name: _column_json(c, matrices.get(c.name), (n, p), json_cell, f"phases.{c.name}")
        for c in PHASE_COLUMNS
    }
    return build(per_sample, index, per_phase, json_cell)


def _index_json(matrices: dict[str, Any]) -> Typed:
    """``phases.index`` as given, else 0..p-1 for the width of the first matrix given."""
    raw = matrices.get("index")
    if raw is None:
        first = next((matrices[c.name] for c in PHASE_COLUMNS if c.name in matrices), None)
        if not (isinstance(first, list) and first and isinstance(first[0], list)):
            raise InvalidInput("give at least one per-phase matrix", field="phases")
        raw = list(range(len(first[0])))
    if not isinstance(raw, list) or not 1 <= len(raw) <= MAX_PHASES:
        raise InvalidInput(
            f"must be an array of 1 to {MAX_PHASES} phase indexes", field="phases.index"
        )

    def cell(k: int, slot: int | None, name: str | None) -> str:
        return f"phases.index[{k}]"

    return in_bounds(INDEX, _typed_json(INDEX, raw, (len(raw),), cell), cell)


# ---------------------------------------------------------------- the OpenAPI description


def _item_schema(column: Column) -> dict[str, Any]:
    item: dict[str, Any]
    if column.kind == "time":
        item = {"anyOf": [{"type": "string", "format": "date-time"}, {"type": "number"}]}
    else:
        item = {"type": {"int": "integer", "float": "number", "bool": "boolean"}[column.kind]}
    if column.bounds is not None:
        item |= {"minimum": column.bounds[0], "maximum": column.bounds[1]}
    return item if column.required else {"anyOf": [item, {"type": "null"}]}


def _array_schema(column: Column, *, per_phase: bool) -> dict[str, Any]:
    item = _item_schema(column)
    if per_phase:
        item = {"type": "array", "items": item, "minItems": 1, "maxItems": MAX_PHASES}
    doc = "one row per sample, one value per phase of phases.index" if per_phase else "per sample"
    description = f"{column.description}; {doc}" if column.description else doc
    return {"type": "array", "items": item, "minItems": 1, "description": description}


COLUMNS_SCHEMA: dict[str, Any] = {
    "title": "SampleColumns",
    "description": (
        "Samples as columns: one array per sample field, one matrix per phase field (rows are "
        "samples, columns the phases listed in phases.index). null is 'not given'; a cell "
        "with nothing given is a phase that sample does not report. The same fields, bounds "
        "and rules as the sample objects; refused whole at the first bad cell, named like "
        "vin_v[3], phases.temp_c[3][1], phases[3][1] (the reading) or phases.index[1]."
    ),
    "type": "object",
    "additionalProperties": False,
    "required": ["seq", "time", "phases"],
    "properties": {
        **{c.name: _array_schema(c, per_phase=False) for c in SAMPLE_COLUMNS},
        "phases": {
            "type": "object",
            "additionalProperties": False,
            "properties": {
                "index": {
                    "type": "array", "items": _item_schema(INDEX), "minItems": 1,
                    "maxItems": MAX_PHASES, "uniqueItems": True,
                    "description": "the phase of each matrix column (default 0..p-1)",
                },
                **{c.name: _array_schema(c, per_phase=True) for c in PHASE_COLUMNS},
            },
        },
    },
}  # fmt: skip
CSV_SCHEMA: dict[str, Any] = {
    "type": "string",
    "description": (
        "A header row, then one row per sample. Sample fields by name (seq, time, vin_v, ...), "
        "phase fields as name[i] for phase i (current_a[0], temp_c[0], breaker_tripped[0], "
        "...). Empty cell: not given; flags 0 or 1; PMBus words decimal. Refusals name the "
        "cell as [k].temp_c[3] (data row k from 0) or [k].phase[3] (the reading)."
    ),
}
