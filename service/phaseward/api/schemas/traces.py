"""Traces uploaded for rehearsals: CSV with one row per sample, or samples as NDJSON/JSON.

CSV layout (README, "Rehearsal and calibration formats"): UTF-8 (a byte-order mark is
ignored), comma-separated, a header row naming the columns in any order, then one row per
sample; blank lines are skipped.

* ``time_s`` (required): sample time, s (epoch seconds or any strictly increasing seconds).
* ``i0_a`` .. ``i{N-1}_a`` (required, one per phase): phase current, A.
* ``vin_v`` (optional): input voltage, V.
* ``t0_c`` .. (optional, per phase): temperature, degC.
* ``iso0`` .. (optional, per phase): 1 when the phase is isolated (breaker tripped or driver
  disabled), 0 or empty when present.

A missing reading (an empty cell, or ``nan`` in any letter case) is allowed in ``vin_v`` and
the temperature columns only; time and current cells must be finite numbers.
"""

from __future__ import annotations

import csv
import re
from collections.abc import Iterable
from typing import Any

import numpy as np
from pydantic import BaseModel, ValidationError

from phaseward.api.errors import field_path
from phaseward.api.schemas.samples import SAMPLES
from phaseward.errors import BadRequest, InvalidInput, PayloadTooLarge
from phaseward.physics.pmbus import linear11_decode, status_word_flags
from phaseward.physics.rehearsal import tick_quantum_ns, to_ticks
from phaseward.store.traces import TraceArrays

_COLUMN = re.compile(r"^(?:i(\d+)_a|t(\d+)_c|iso(\d+))$")
CSV_FORMAT = (
    "CSV: header time_s, i0_a..i{N-1}_a (A), optional vin_v (V), t{k}_c (degC) and iso{k} "
    "(1 = phase isolated); empty or nan = no reading (vin_v and temperatures only)"
)


class TraceOut(BaseModel):
    id: int
    name: str
    n_samples: int
    n_phases: int
    start_s: float
    end_s: float


def parse_csv(lines: Iterable[str], *, name: str, max_samples: int) -> TraceArrays:
    """A trace read row by row from ``lines`` (a text file; module docstring): memory holds the
    numbers, never the whole text. InvalidInput names the header or the line."""
    rows = (
        (line, row)
        for line, row in enumerate(csv.reader(lines), 1)
        if any(cell.strip() for cell in row)
    )
    first = next(rows, None)
    if first is None:
        raise BadRequest("a trace needs a header and at least two samples", field="body")
    header = [h.strip().removeprefix("\ufeff") for h in first[1]]
    kinds: dict[str, dict[int, int]] = {"i": {}, "t": {}, "iso": {}}
    for k, h in enumerate(header):
        if h in ("time_s", "vin_v"):
            continue
        m = _COLUMN.match(h)
        if m is None:
            raise InvalidInput(f"unknown column '{h}'; {CSV_FORMAT}", field="header")
        groups = zip(("i", "t", "iso"), m.groups(), strict=True)
        kind, index = next((kd, int(v)) for kd, v in groups if v)
        kinds[kind][index] = k
    if "time_s" not in header or len(set(header)) != len(header):
        raise InvalidInput(f"the header needs time_s once, and no column twice; {CSV_FORMAT}",
                           field="header")  # fmt: skip
    n_phases = len(kinds["i"])
    if n_phases == 0 or sorted(kinds["i"]) != list(range(n_phases)):
        raise InvalidInput("current columns must be i0_a .. i{N-1}_a", field="header")
    if any(i >= n_phases for kd in ("t", "iso") for i in kinds[kd]):
        raise InvalidInput("a t{k}_c or iso{k} column names no phase i{k}_a", field="header")
    optional = {k for kd in ("t", "iso") for k in kinds[kd].values()}
    if "vin_v" in header:
        optional.add(header.index("vin_v"))
    values = np.full((1024, len(header)), np.nan)
    n = 0
    for line, row in rows:
        if n == max_samples:
            raise PayloadTooLarge(f"more than {max_samples} samples", field="body")
        if n == len(values):  # grow by doubling: amortised, bounded by max_samples
            values = np.vstack([values, np.full_like(values, np.nan)])
        r = n
        n += 1
        if len(row) != len(header):
            raise InvalidInput(
                f"line {line} has {len(row)} cells, the header {len(header)}", field=f"line {line}"
            )
        for c, cell in enumerate(row):
            text_ = cell.strip()
            if text_ == "" or text_.lower() == "nan":
                if c in optional:
                    continue
                raise InvalidInput(
                    f"line {line}, {header[c]}: a reading is required here (an empty or nan "
                    "cell means no reading, allowed in vin_v and temperature columns only)",
                    field=f"line {line}",
                )
            try:
                values[r, c] = float(text_)
            except ValueError:
                raise InvalidInput(
                    f"line {line}, {header[c]}: '{cell}' is not a number", field=f"line {line}"
                ) from None
            if not np.isfinite(values[r, c]):
                raise InvalidInput(f"line {line}, {header[c]}: not finite", field=f"line {line}")
    if n < 2:
        raise BadRequest("a trace needs a header and at least two samples", field="body")
    values = values[:n]

    def per_phase(kind: str, fill: float) -> Any:
        out = np.full((n, n_phases), fill)
        for i, k in kinds[kind].items():
            out[:, i] = np.where(np.isnan(values[:, k]), fill, values[:, k])
        return out

    isolated = per_phase("iso", 0.0)
    if not np.isin(isolated, (0.0, 1.0)).all():
        raise InvalidInput("iso{k} cells must be 0, 1 or empty", field="header")
    vin = values[:, header.index("vin_v")] if "vin_v" in header else np.full(n, np.nan)
    return _checked(
        TraceArrays(
            name=name, t_s=values[:, header.index("time_s")], vin_v=vin,
            current_a=per_phase("i", np.nan), temp_c=per_phase("t", np.nan),
            isolated=isolated == 1.0,
        )
    )  # fmt: skip


def parse_samples(items: list[Any], *, name: str) -> TraceArrays:
    """Samples in the ingest format; currents as current_a or read_iout (a sense voltage needs
    a rail's DCR: post such samples to the rail and rehearse on its stored window). A phase is
    isolated where it reports breaker_tripped or driver_disabled (or STATUS_WORD's OFF bit)."""
    try:
        samples = SAMPLES.validate_python(items)
    except ValidationError as err:
        first = err.errors()[0]
        raise InvalidInput(str(first["msg"]), field=field_path(tuple(first["loc"]))) from err
    n_phases = 1 + max(r.index for s in samples for r in s.phases)
    current = np.full((len(samples), n_phases), np.nan)
    temp = np.full((len(samples), n_phases), np.nan)
    isolated = np.zeros((len(samples), n_phases), dtype=bool)
    for k, s in enumerate(samples):
        for j, r in enumerate(s.phases):
            if r.current_a is not None:
                amps = r.current_a
            elif r.read_iout is not None:
                amps = float(linear11_decode(r.read_iout))
            else:
                raise InvalidInput(
                    "a trace takes current_a or read_iout, not sense_v",
                    field=f"[{k}].phases[{j}].sense_v",
                )
            current[k, r.index] = amps
            temp[k, r.index] = np.nan if r.temp_c is None else r.temp_c
            off = r.status_word is not None and bool(status_word_flags(r.status_word)["OFF"])
            isolated[k, r.index] = r.breaker_tripped or r.driver_disabled or off
    if np.isnan(current).any():
        k, i = np.argwhere(np.isnan(current))[0]
        raise InvalidInput(f"sample {k} has no reading for phase {i}", field=f"[{k}].phases")
    return _checked(
        TraceArrays(
            name=name, t_s=np.array([s.time for s in samples]),
            vin_v=np.array([np.nan if s.vin_v is None else s.vin_v for s in samples]),
            current_a=current, temp_c=temp, isolated=isolated,
        )
    )  # fmt: skip


def _checked(trace: TraceArrays) -> TraceArrays:
    if trace.t_s.size < 2:
        raise InvalidInput("a trace needs at least two samples", field="body")
    if not (np.diff(trace.t_s) > 0).all():
        k = int(np.argmax(np.diff(trace.t_s) <= 0)) + 1
        raise InvalidInput(f"sample {k} is not later than the one before", field=f"[{k}].time")
    ticks = to_ticks(trace.t_s, tick_quantum_ns(trace.t_s))
    if not (np.diff(ticks) > 0).all():
        k = int(np.argmax(np.diff(ticks) <= 0)) + 1
        raise InvalidInput(
            f"sample {k} is less than the clock's resolution after the one before",
            field=f"[{k}].time",
        )
    return trace
