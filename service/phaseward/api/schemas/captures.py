"""Fault captures as uploaded: CSV, a NumPy ``.npy`` structured array, or an ``.npz`` archive.

Every format carries named columns of one length (our own layout):

* ``t_s``: seconds from the trigger (the trip at 0, negative before), strictly increasing;
* ``vin_v``, ``vout_v``: input and output voltage, V;
* ``i0_a`` .. ``i{N-1}_a``: every phase's current, A (N = the rail's phase count);
* optional ``iin_a`` (input current, A), ``sw0_v`` .. (switch nodes, V) and ``g0_v`` .. (gate
  drive, V), each for every phase or for none.

CSV: a header line with the names, then one row of numbers per sample. ``.npy``: a 1-D
structured array whose field names are the column names. ``.npz``: one 1-D array per name. NumPy
files are read with ``allow_pickle=False`` and their headers checked before any data is read: an
object dtype, a declared size beyond the upload limit or a member that is not one of the names
is refused (422, or 413 for size).
"""

from __future__ import annotations

import io
import re
import warnings
import zipfile
from typing import IO, Any

import numpy as np
import numpy.typing as npt
from pydantic import BaseModel

from phaseward.api.schemas.common import CAUTION
from phaseward.errors import InvalidInput, PayloadTooLarge, UnsupportedMediaType
from phaseward.store.captures import CaptureArrays

F64 = npt.NDArray[np.float64]
MEDIA = {"text/csv": "csv", "application/x-npy": "npy", "application/x-npz": "npz",
         "application/zip": "npz"}  # fmt: skip
_PER_PHASE = {"current_a": re.compile(r"^i(\d+)_a$"), "switch_v": re.compile(r"^sw(\d+)_v$"),
              "gate_v": re.compile(r"^g(\d+)_v$")}  # fmt: skip
_SINGLE = ("t_s", "vin_v", "vout_v", "iin_a")


class CaptureOut(BaseModel):
    id: int
    event_id: int
    rail_id: str
    phase: int
    n_samples: int
    n_phases: int
    channels: list[str]
    signature: dict[str, Any]
    caution: str = CAUTION


def capture_format(content_type: str) -> str:
    """csv, npy or npz from the request's content type; 415 for anything else."""
    media = content_type.split(";")[0].strip().lower()
    kind = MEDIA.get(media)
    if kind is None:
        raise UnsupportedMediaType(
            f"send a capture as {', '.join(MEDIA)}, not {media or 'no content type'}",
            field="content-type",
        )
    return kind


def parse_capture(
    body: IO[bytes], *, kind: str, size_limit: int, max_samples: int
) -> CaptureArrays:
    """The capture in ``body`` (a file positioned at 0) in format ``kind`` as arrays; 413
    beyond ``max_samples`` or ``size_limit`` declared bytes, 422 naming the column or line for
    anything malformed."""
    if kind == "csv":
        columns = _csv(body, max_samples)
    elif kind == "npy":
        columns = _structured(_npy(body, size_limit, "body"))
    else:
        columns = _npz(body, size_limit)
    return _arrays(columns, kind, max_samples)


def _csv(body: IO[bytes], max_samples: int) -> dict[str, F64]:
    text = io.TextIOWrapper(body, encoding="utf-8", errors="strict", newline="")
    try:
        header = [name.strip() for name in text.readline().split(",")]
        with warnings.catch_warnings():  # a header alone is "no data": refused below, by name
            warnings.simplefilter("ignore", UserWarning)
            values = np.loadtxt(text, delimiter=",", dtype=np.float64, ndmin=2,
                                max_rows=max_samples + 1)  # fmt: skip
    except UnicodeDecodeError as err:
        raise InvalidInput("the CSV is not UTF-8 text", field="body") from err
    except ValueError as err:  # numpy names the line and the cell
        raise InvalidInput(f"the CSV cannot be read: {err}", field="body") from err
    finally:
        text.detach()
    if values.size == 0:
        values = np.empty((0, len(header)))
    if values.shape[1] != len(header):
        raise InvalidInput(
            f"rows have {values.shape[1]} cells, the header {len(header)}", field="header"
        )
    if values.shape[0] > max_samples:
        raise PayloadTooLarge(f"more than {max_samples} samples in the capture", field="body")
    if len(set(header)) != len(header):
        raise InvalidInput("a column name appears twice in the header", field="header")
    return {name: values[:, k] for k, name in enumerate(header)}


def _npy(stream: IO[bytes], size_limit: int, field: str) -> npt.NDArray[Any]:
    """One .npy array, its header checked before its data is read."""
    fmt = np.lib.format
    try:
        version = fmt.read_magic(stream)
        if version == (1, 0):
            shape, _, dtype = fmt.read_array_header_1_0(stream)
        elif version == (2, 0):
            shape, _, dtype = fmt.read_array_header_2_0(stream)
        else:
            raise ValueError(f"format version {version} is not 1.0 or 2.0")
    except ValueError as err:
        raise InvalidInput(f"not a NumPy .npy file: {err}", field=field) from err
    if dtype.hasobject:
        raise InvalidInput("object arrays are refused (they would need pickle)", field=field)
    declared = int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
    if declared > size_limit:
        raise PayloadTooLarge(
            f"the array declares {declared} bytes, over {size_limit}", field=field
        )
    data = stream.read(declared)
    if len(data) != declared:
        raise InvalidInput("the array is shorter than its header declares", field=field)
    return np.frombuffer(data, dtype=dtype).reshape(shape)


def _structured(array: npt.NDArray[Any]) -> dict[str, F64]:
    names = array.dtype.names
    if names is None or array.ndim != 1:
        raise InvalidInput(
            "a .npy capture is a 1-D structured array whose field names are the columns",
            field="body",
        )
    return {name: _floats(array[name], name) for name in names}


def _npz(body: IO[bytes], size_limit: int) -> dict[str, F64]:
    try:
        archive = zipfile.ZipFile(body)
    except zipfile.BadZipFile as err:
        raise InvalidInput(f"not a NumPy .npz archive: {err}", field="body") from err
    with archive:
        members = archive.infolist()
        total = sum(m.file_size for m in members)
        if total > size_limit:
            raise PayloadTooLarge(
                f"the archive unpacks to {total} bytes, over {size_limit}", field="body"
            )
        columns = {}
        for member in members:
            name = member.filename.removesuffix(".npy")
            with archive.open(member) as stream:
                columns[name] = _floats(_npy(stream, size_limit, name), name)
    return columns


def _floats(values: npt.NDArray[Any], name: str) -> F64:
    if values.ndim != 1 or values.dtype.kind not in "iuf":
        raise InvalidInput(f"column {name} must be a 1-D array of numbers", field=name)
    return values.astype(np.float64)


def _arrays(columns: dict[str, F64], kind: str, max_samples: int) -> CaptureArrays:
    per_phase: dict[str, dict[int, F64]] = {key: {} for key in _PER_PHASE}
    for name, values in columns.items():
        match = next(((k, m) for k, p in _PER_PHASE.items() if (m := p.match(name))), None)
        if match is not None:
            per_phase[match[0]][int(match[1].group(1))] = values
        elif name not in _SINGLE:
            raise InvalidInput(
                f"unknown column '{name}' (t_s, vin_v, vout_v, iin_a, i<k>_a, sw<k>_v, g<k>_v)",
                field=name,
            )
    for name in ("t_s", "vin_v", "vout_v"):
        if name not in columns:
            raise InvalidInput(f"the capture has no {name} column", field=name)
    n = columns["t_s"].size
    if n > max_samples:
        raise PayloadTooLarge(f"{n} samples exceed the limit of {max_samples}", field="body")
    for name, values in columns.items():
        if values.size != n:
            raise InvalidInput(f"column {name} has {values.size} values, t_s {n}", field=name)
        if not np.all(np.isfinite(values)):
            k = int(np.argmin(np.isfinite(values)))
            raise InvalidInput(f"column {name}, sample {k}: not a finite number", field=name)
    currents = per_phase["current_a"]
    n_phases = len(currents)
    if n_phases == 0 or sorted(currents) != list(range(n_phases)):
        raise InvalidInput("phase currents must be columns i0_a .. i{N-1}_a", field="i0_a")

    def stack(key: str) -> F64 | None:
        found = per_phase[key]
        if not found:
            return None
        if sorted(found) != list(range(n_phases)):
            prefix = "sw" if key == "switch_v" else "g"
            raise InvalidInput(
                f"give {prefix}<k>_v for every phase 0..{n_phases - 1} or for none",
                field=f"{prefix}0_v",
            )
        return np.stack([found[k] for k in range(n_phases)], axis=1)

    t = columns["t_s"]
    if n < 4 or not np.all(np.diff(t) > 0.0):
        k = int(np.argmin(np.diff(t) > 0.0)) + 1 if n >= 2 else 0
        raise InvalidInput(
            f"t_s must rise strictly over at least 4 samples (sample {k} does not)", field="t_s"
        )
    current = stack("current_a")
    assert current is not None
    return CaptureArrays(
        source_format=kind, t_s=t, vin_v=columns["vin_v"], vout_v=columns["vout_v"],
        current_a=current, iin_a=columns.get("iin_a"), switch_v=stack("switch_v"),
        gate_v=stack("gate_v"),
    )  # fmt: skip
