"""Telemetry as arrays: the API hands samples over in long form, the monitor scatters them
into (n_samples, n_phases) arrays and turns every current reading into amps."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from phaseward.errors import InvalidInput
from phaseward.monitor.rail_model import RailModel
from phaseward.physics.constants import ALPHA_CU_20, T_REF_CU_C
from phaseward.physics.pmbus import linear11_decode, linear16_decode
from phaseward.physics.sensing import dcr_sense_to_current_a

F64 = npt.NDArray[np.float64]
I64 = npt.NDArray[np.int64]

# Per-phase flag bits as stored in the samples table (one byte per phase).
FLAG_BREAKER = 1  # input circuit breaker (hot-swap) tripped
FLAG_DRIVER_OFF = 2  # driver disabled
FLAG_OVERCURRENT = 4
FLAG_OVERTEMP = 8
FLAG_VOUT_FAULT = 16  # the device reports its output outside its fault limits (informs only)
FLAG_NAMES = {
    "breaker_tripped": FLAG_BREAKER,
    "driver_disabled": FLAG_DRIVER_OFF,
    "overcurrent": FLAG_OVERCURRENT,
    "overtemperature": FLAG_OVERTEMP,
    "vout_fault": FLAG_VOUT_FAULT,
}
ISOLATING_FLAGS = FLAG_BREAKER | FLAG_DRIVER_OFF
NO_WORD = -1

# How a refusal names a cell of the body it came in: (sample, slot in its phase list or None
# for a per-sample field, field name or None for the whole reading) -> the field it reports.
CellName = Callable[[int, int | None, str | None], str]


def object_cell(k: int, slot: int | None, name: str | None) -> str:
    """A cell of a body of sample objects: ``[k].vin_v``, ``[k].phases[j].temp_c``."""
    where = f"[{k}]" if slot is None else f"[{k}].phases[{slot}]"
    return where if name is None else f"{where}.{name}"


@dataclass(frozen=True)
class IncomingSamples:
    """Samples as the API validated them, in long form.

    Per sample (n,): seq, t_s, vin_v, vout_v (NaN: from the phases' words), iout_a, iin_a,
    ambient_c (NaN if absent). Per reading (m,): item (which sample), slot (position in its
    phase list), phase index, current_a, sense_v (NaN if absent), the raw PMBus words
    iout_word, vin_word, iin_word, vout_word, temp_word (NO_WORD if absent), temp_c (NaN), flags.
    Exactly one of current_a, sense_v and iout_word is given per reading (the schema checks).
    ``cell`` names a cell in the terms of the body the samples came in (objects or columns).
    """

    seq: I64
    t_s: F64
    vin_v: F64
    vout_v: F64
    iout_a: F64
    iin_a: F64
    ambient_c: F64
    item: I64
    slot: I64
    phase: I64
    current_a: F64
    sense_v: F64
    iout_word: I64
    vin_word: I64
    iin_word: I64
    vout_word: I64
    temp_word: I64
    temp_c: F64
    flags: npt.NDArray[np.uint8]
    cell: CellName = object_cell

    @property
    def n(self) -> int:
        return int(self.seq.shape[0])

    @classmethod
    def none(cls) -> IncomingSamples:
        """No samples: a pass that judges what a rail has waiting (``GroupCommit.settle``)."""

        def empty(dtype: type[Any]) -> Any:
            return np.zeros(0, dtype=dtype)

        ints, floats = empty(np.int64), empty(np.float64)
        return cls(
            seq=ints, t_s=floats, vin_v=floats, vout_v=floats, iout_a=floats, iin_a=floats,
            ambient_c=floats, item=ints, slot=ints, phase=ints, current_a=floats,
            sense_v=floats, iout_word=ints, vin_word=ints, iin_word=ints, vout_word=ints,
            temp_word=ints, temp_c=floats, flags=empty(np.uint8),
        )  # fmt: skip


def concat(parts: Sequence[IncomingSamples]) -> IncomingSamples:
    """Several requests' samples as one batch (readings renumbered to their merged sample)."""
    if len(parts) == 1:  # a lone request, the most common group of a fleet
        return parts[0]
    offsets = np.cumsum([0, *(p.n for p in parts[:-1])])
    fields: dict[str, Any] = {
        f: np.concatenate([getattr(p, f) for p in parts])
        for f in IncomingSamples.__dataclass_fields__
        if f not in ("item", "cell")
    }
    item = np.concatenate([p.item + o for p, o in zip(parts, offsets, strict=True)])
    return IncomingSamples(item=item, **fields)


@dataclass(frozen=True)
class SampleBatch:
    """Samples in engineering units, (n,) per sample and (n, n_phases) per phase.
    ``present`` is False where a phase was not reported (its values are NaN, flags 0);
    ``sensed`` is True where its current was converted from a sense voltage (at its reported
    temperature, so it is only as good as that temperature)."""

    seq: I64
    t_s: F64
    vin_v: F64
    vout_v: F64
    iout_a: F64
    iin_a: F64
    ambient_c: F64
    present: npt.NDArray[np.bool_]
    current_a: F64
    temp_c: F64
    flags: npt.NDArray[np.uint8]
    sensed: npt.NDArray[np.bool_]

    @property
    def n(self) -> int:
        return int(self.seq.shape[0])

    def take(self, rows: npt.NDArray[np.intp] | npt.NDArray[np.bool_]) -> SampleBatch:
        return SampleBatch(**{f: getattr(self, f)[rows] for f in self.__dataclass_fields__})


def join(*parts: SampleBatch) -> SampleBatch:
    """Batches of one rail as one, in the order given."""
    return SampleBatch(
        **{
            f: np.concatenate([getattr(part, f) for part in parts])
            for f in SampleBatch.__dataclass_fields__
        }
    )


def in_time_order(*parts: SampleBatch) -> SampleBatch:
    """Batches of one rail as one, in time order (stable: the order given among equal times,
    so parts each in time order come out as if merged in one after the other)."""
    both = join(*parts)
    return both.take(np.argsort(both.t_s, kind="stable"))


def to_batch(incoming: IncomingSamples, model: RailModel) -> SampleBatch:
    """Check phase indexes against the rail and convert sense voltages and READ_IOUT words.

    A sense voltage is converted with the DCR at the phase's reported temperature (the
    inductor sits beside the power stage), else the sample's ambient, else the rail's. Every
    current, however given, is then calibrated with the phase's declared sense gain and offset:
    amps = sense_gain x reading + sense_offset_a.
    """
    n, p = incoming.n, model.n_phases
    bad = np.nonzero(incoming.phase >= p)[0]
    if bad.size:
        k = int(bad[0])
        raise InvalidInput(
            f"phase index {int(incoming.phase[k])} is out of range: rail '{model.rail_id}' "
            f"has {p} phases (0..{p - 1})",
            field=incoming.cell(int(incoming.item[k]), int(incoming.slot[k]), "index"),
        )
    seen = np.zeros((n, p), dtype=bool)
    flat = incoming.item * p + incoming.phase
    if flat.size and np.bincount(flat, minlength=n * p).max() > 1:  # then find the first
        dup = np.ones(flat.shape, dtype=bool)
        dup[np.unique(flat, return_index=True)[1]] = False
        k = int(np.nonzero(dup)[0][0])
        raise InvalidInput(
            f"phase {int(incoming.phase[k])} appears twice in one sample",
            field=incoming.cell(int(incoming.item[k]), int(incoming.slot[k]), "index"),
        )

    ambient = np.where(np.isfinite(incoming.ambient_c), incoming.ambient_c, model.ambient_c)
    temp_for_dcr = np.where(np.isfinite(incoming.temp_c), incoming.temp_c, ambient[incoming.item])
    _check_dcr_temperature(incoming, temp_for_dcr)
    from_sense = (
        dcr_sense_to_current_a(
            incoming.sense_v,
            model.dcr_ohm[incoming.phase],
            np.where(np.isfinite(incoming.sense_v), temp_for_dcr, T_REF_CU_C),  # only these
            ref_temp_c=model.dcr_ref_c[incoming.phase],
        )
        if np.isfinite(incoming.sense_v).any()
        else incoming.sense_v  # no sense voltage: all NaN, and never picked below
    )
    from_word = _decoded(incoming.iout_word, linear11_decode)
    read = np.where(
        np.isfinite(incoming.current_a),
        incoming.current_a,
        np.where(np.isfinite(incoming.sense_v), from_sense, from_word),
    )
    amps = model.sense_gain[incoming.phase] * read + model.sense_offset_a[incoming.phase]

    current = np.full((n, p), np.nan)
    temp = np.full((n, p), np.nan)
    flags = np.zeros((n, p), dtype=np.uint8)
    current[incoming.item, incoming.phase] = amps
    temp[incoming.item, incoming.phase] = np.where(
        np.isfinite(incoming.temp_c), incoming.temp_c, _decoded(incoming.temp_word, linear11_decode)
    )
    flags[incoming.item, incoming.phase] = incoming.flags
    seen[incoming.item, incoming.phase] = True
    sensed = np.zeros((n, p), dtype=bool)
    sensed[incoming.item, incoming.phase] = np.isfinite(incoming.sense_v)
    vin_words = _decoded(incoming.vin_word, linear11_decode)
    iin_words = _decoded(incoming.iin_word, linear11_decode)
    for word, values in (("read_vin", vin_words), ("read_iin", iin_words)):
        if (values < 0.0).any():  # LINEAR11 is signed; an input voltage or current is not
            k = int(np.argmax(values < 0.0))
            raise InvalidInput(
                f"{word} decodes to {float(values[k]):g}, below zero",
                field=incoming.cell(int(incoming.item[k]), int(incoming.slot[k]), word),
            )
    vin = _or_phases(incoming.vin_v, incoming, vin_words)
    vout = _or_phases(incoming.vout_v, incoming, _vout(incoming, model))
    for name, values, word in (("vin_v", vin, "read_vin"), ("vout_v", vout, "read_vout")):
        if np.isnan(values).any():
            raise InvalidInput(
                f"give {name} or {word} on every phase",
                field=incoming.cell(int(np.argmax(np.isnan(values))), None, name),
            )
    return SampleBatch(
        seq=incoming.seq,
        t_s=incoming.t_s,
        vin_v=vin,
        vout_v=vout,
        iout_a=incoming.iout_a,
        iin_a=_or_phases(incoming.iin_a, incoming, iin_words, sum_of=True),
        ambient_c=incoming.ambient_c,
        present=seen,
        current_a=current,
        temp_c=temp,
        flags=flags,
        sensed=sensed,
    )


def _decoded(words: I64, decode: Callable[[I64], F64]) -> F64:
    """Decoded PMBus words, NaN where none was given."""
    given = words != NO_WORD
    if not given.any():  # the usual body: values, no words
        return np.full(words.shape, np.nan)
    return np.where(given, decode(np.where(given, words, 0)), np.nan)


def _vout(incoming: IncomingSamples, model: RailModel) -> F64:
    """READ_VOUT words as volts: LINEAR16 with the exponent of the rail's VOUT_MODE."""
    given = incoming.vout_word != NO_WORD
    if not given.any():
        return np.full(given.shape, np.nan)
    if model.vout_mode is None:
        k = int(np.argmax(given))
        raise InvalidInput(
            f"rail '{model.rail_id}' has no vout_mode to decode READ_VOUT (LINEAR16) with",
            field=incoming.cell(int(incoming.item[k]), int(incoming.slot[k]), "read_vout"),
        )
    mode = model.vout_mode
    return _decoded(incoming.vout_word, lambda w: linear16_decode(w, mode))


def _or_phases(
    given: F64, incoming: IncomingSamples, per_reading: F64, *, sum_of: bool = False
) -> F64:
    """A per-sample value as given, else the mean (or, with ``sum_of``, the sum) of its
    readings' decoded words, taken only where every reading of the sample has one."""
    if np.isfinite(given).all():  # given for every sample: the words are not looked at
        return given.copy()
    n = incoming.n
    have = np.isfinite(per_reading)
    count = np.bincount(incoming.item, minlength=n)
    found = np.bincount(incoming.item, weights=have, minlength=n)
    total = np.bincount(incoming.item, weights=np.where(have, per_reading, 0.0), minlength=n)
    complete = (found == count) & (count > 0)
    from_words = np.where(complete, total / np.where(sum_of, 1.0, np.maximum(count, 1)), np.nan)
    return np.where(np.isfinite(given), given, from_words)


def _check_dcr_temperature(incoming: IncomingSamples, temp_c: F64) -> None:
    """A sense voltage converts only at a winding temperature where copper still has a
    resistance (above about -234 degC); a colder reading is a sensor fault, named here."""
    cold = np.isfinite(incoming.sense_v) & ~(1.0 + ALPHA_CU_20 * (temp_c - T_REF_CU_C) > 0.0)
    if not cold.any():
        return
    k = int(np.nonzero(cold)[0][0])
    item, slot = int(incoming.item[k]), int(incoming.slot[k])
    if np.isfinite(incoming.temp_c[k]):
        field = incoming.cell(item, slot, "temp_c")
    elif np.isfinite(incoming.ambient_c[item]):
        field = incoming.cell(item, None, "ambient_c")
    else:
        field = incoming.cell(item, slot, "sense_v")
    raise InvalidInput(
        f"a sense voltage cannot be converted at {float(temp_c[k]):g} degC: copper has no "
        f"resistance left at or below {T_REF_CU_C - 1.0 / ALPHA_CU_20:.1f} degC",
        field=field,
    )
