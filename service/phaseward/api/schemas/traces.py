"""Traces uploaded for rehearsals: CSV with one row per sample, or samples as NDJSON/JSON.

CSV layout (our own): a header ``time_s,vin_v,i0_a,...,i{N-1}_a[,t0_c,...,t{N-1}_c]`` and one
row per sample; times in epoch seconds (or any increasing seconds), currents in A, optional
temperatures in degC (empty cell = no reading).
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
from phaseward.physics.pmbus import linear11_decode
from phaseward.store.traces import TraceArrays

_CURRENT = re.compile(r"^i(\d+)_a$")
_TEMP = re.compile(r"^t(\d+)_c$")


class TraceOut(BaseModel):
    id: int
    name: str
    n_samples: int
    n_phases: int
    start_s: float
    end_s: float


def parse_csv(lines: Iterable[str], *, name: str, max_samples: int) -> TraceArrays:
    """A CSV trace read row by row from ``lines`` (a text file): memory holds the numbers,
    never the whole text or all its cells at once."""
    reader = csv.reader(lines)
    first = next(reader, None)
    if first is None:
        raise BadRequest("a trace needs a header and at least two samples", field="body")
    header = [h.strip() for h in first]
    if header[:2] != ["time_s", "vin_v"]:
        raise InvalidInput("the header must start with time_s,vin_v", field="header")
    currents = {int(m.group(1)): k for k, h in enumerate(header) if (m := _CURRENT.match(h))}
    temps = {int(m.group(1)): k for k, h in enumerate(header) if (m := _TEMP.match(h))}
    n_phases = len(currents)
    if n_phases == 0 or sorted(currents) != list(range(n_phases)):
        raise InvalidInput("current columns must be i0_a .. i{N-1}_a", field="header")
    if any(i >= n_phases for i in temps) or len(header) != 2 + n_phases + len(temps):
        raise InvalidInput(f"unexpected columns in {header}", field="header")
    values = np.full((1024, len(header)), np.nan)
    n = 0
    for r, row in enumerate(reader, start=2):
        if n == max_samples:
            raise PayloadTooLarge(f"more than {max_samples} samples", field="body")
        if n == len(values):  # grow by doubling: amortised, bounded by max_samples
            values = np.vstack([values, np.full_like(values, np.nan)])
        n += 1
        if len(row) != len(header):
            raise InvalidInput(
                f"line {r} has {len(row)} cells, the header {len(header)}", field=f"line {r}"
            )
        for c, cell in enumerate(row):
            if cell.strip() == "" and c in temps.values():
                continue
            try:
                values[r - 2, c] = float(cell)
            except ValueError:
                raise InvalidInput(
                    f"line {r}, {header[c]}: '{cell}' is not a number", field=f"line {r}"
                ) from None
            if not np.isfinite(values[r - 2, c]):
                raise InvalidInput(f"line {r}, {header[c]}: not finite", field=f"line {r}")
    if n < 2:
        raise BadRequest("a trace needs a header and at least two samples", field="body")
    values = values[:n]
    temp_c = np.full((n, n_phases), np.nan)
    for i, k in temps.items():
        temp_c[:, i] = values[:, k]
    return _checked(
        TraceArrays(
            name=name, t_s=values[:, 0], vin_v=values[:, 1],
            current_a=values[:, [currents[i] for i in range(n_phases)]], temp_c=temp_c,
        )
    )  # fmt: skip


def parse_samples(items: list[Any], *, name: str) -> TraceArrays:
    """Samples in the ingest format; currents as current_a or read_iout (a sense voltage needs
    a rail's DCR: post such samples to the rail and rehearse on its stored window)."""
    try:
        samples = SAMPLES.validate_python(items)
    except ValidationError as err:
        first = err.errors()[0]
        raise InvalidInput(str(first["msg"]), field=field_path(tuple(first["loc"]))) from err
    n_phases = 1 + max(r.index for s in samples for r in s.phases)
    current = np.full((len(samples), n_phases), np.nan)
    temp = np.full((len(samples), n_phases), np.nan)
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
    missing = [k for k, s in enumerate(samples) if s.vin_v is None]
    if missing:
        raise InvalidInput("a trace takes vin_v on every sample", field=f"[{missing[0]}].vin_v")
    if np.isnan(current).any():
        k, i = np.argwhere(np.isnan(current))[0]
        raise InvalidInput(f"sample {k} has no reading for phase {i}", field=f"[{k}].phases")
    return _checked(
        TraceArrays(
            name=name, t_s=np.array([s.time for s in samples]),
            vin_v=np.array([s.vin_v for s in samples], dtype=np.float64), current_a=current,
            temp_c=temp,
        )
    )  # fmt: skip


def _checked(trace: TraceArrays) -> TraceArrays:
    if trace.t_s.size < 2:
        raise InvalidInput("a trace needs at least two samples", field="body")
    if not (np.diff(trace.t_s) > 0).all():
        k = int(np.argmax(np.diff(trace.t_s) <= 0)) + 1
        raise InvalidInput(f"sample {k} is not later than the one before", field=f"[{k}].time")
    return trace
