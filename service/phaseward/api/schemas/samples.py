"""Telemetry as it arrives: one sample, an array, or NDJSON lines of samples."""

from __future__ import annotations

from datetime import datetime
from operator import attrgetter
from typing import Annotated, Any, Self

import numpy as np
import numpy.typing as npt
from pydantic import BeforeValidator, Field, TypeAdapter, WithJsonSchema, model_validator

from phaseward.api.schemas.common import Celsius, Contract
from phaseward.monitor.telemetry import (
    FLAG_DRIVER_OFF,
    FLAG_NAMES,
    FLAG_OVERCURRENT,
    FLAG_OVERTEMP,
    FLAG_VOUT_FAULT,
    NO_WORD,
    IncomingSamples,
)
from phaseward.physics.pmbus import (
    status_input_flags,
    status_iout_flags,
    status_temperature_flags,
    status_vout_flags,
    status_word_flags,
)

EPOCH_MAX_S = 1.0e11  # far beyond any real clock; catches milliseconds sent as seconds
# Every bound of a sample, in one place: the per-object schema below and the columnar bodies
# (api/schemas/columns.py) both take them from here.
SEQ_RANGE = (0, 2**62)
WORD_RANGE = (0, 0xFFFF)  # a PMBus word
BYTE_RANGE = (0, 0xFF)  # a PMBus status byte
PHASE_INDEX_RANGE = (0, 63)
MAX_PHASES = 64  # readings per sample
# Bounds of what can be a reading at all, far beyond any real rail, so that nothing accepted
# can overflow the physics (a current of 1e300 A squared is infinite). Readings inside these
# bounds that the rail cannot produce are stored as received and flagged by the plausibility
# gate (physics/plausibility.py), which is where a rail's own limits apply.
AMPS_RANGE = (-1e9, 1e9)
INPUT_AMPS_RANGE = (0.0, 1e9)
SENSE_VOLTS_RANGE = (-1e3, 1e3)  # DCR sense voltages are millivolts
VOLTS_RANGE = (0.0, 1e6)


def _within(bounds: tuple[float, float]) -> Any:
    return Field(ge=bounds[0], le=bounds[1])


Word = Annotated[int, _within(WORD_RANGE)]
Amps = Annotated[float, _within(AMPS_RANGE)]
SenseVolts = Annotated[float, _within(SENSE_VOLTS_RANGE)]
Volts = Annotated[float, _within(VOLTS_RANGE)]
Byte = Annotated[int, _within(BYTE_RANGE)]


class PhaseReading(Contract):
    """One phase in one sample. Give the current as exactly one of ``current_a``, ``sense_v``
    (voltage across the inductor DCR, converted with the temperature-compensated DCR) or
    ``read_iout`` (a raw PMBus READ_IOUT word, LINEAR11)."""

    index: Annotated[int, _within(PHASE_INDEX_RANGE)]
    current_a: Amps | None = None
    sense_v: SenseVolts | None = None
    read_iout: Word | None = None
    temp_c: Celsius | None = None
    breaker_tripped: bool = False
    driver_disabled: bool = False
    overcurrent: bool = False
    overtemperature: bool = False
    vout_fault: bool = Field(
        default=False,
        description="the device reports its output voltage outside its fault limits "
        "(informs; does not isolate the phase: the output is shared)",
    )
    status_word: Word | None = Field(
        default=None,
        description="PMBus STATUS_WORD: OFF sets driver_disabled, IOUT_OC_FAULT overcurrent, "
        "TEMPERATURE overtemperature.",
    )
    # Raw PMBus words, decoded on ingest: LINEAR11 except READ_VOUT (LINEAR16 with the rail's
    # vout_mode). A sample without vin_v / vout_v takes the mean of its phases' READ_VIN /
    # READ_VOUT, without iin_a the sum of their READ_IIN (when every phase gives one).
    read_vin: Word | None = None
    read_iin: Word | None = None
    read_vout: Word | None = None
    read_temperature_1: Word | None = Field(default=None, description="instead of temp_c")
    status_iout: Byte | None = Field(default=None, description="IOUT_OC_FAULT sets overcurrent")
    status_temperature: Byte | None = Field(
        default=None, description="OT_FAULT or OT_WARNING sets overtemperature"
    )
    status_input: Byte | None = Field(
        default=None,
        description="IIN_OC_FAULT sets overcurrent; UNIT_OFF_LOW_VIN sets driver_disabled",
    )
    status_vout: Byte | None = Field(
        default=None, description="VOUT_OV_FAULT or VOUT_UV_FAULT sets vout_fault"
    )

    @model_validator(mode="after")
    def _one_current(self) -> Self:
        given = [v is not None for v in (self.current_a, self.sense_v, self.read_iout)]
        if sum(given) != 1:
            raise ValueError("give exactly one of current_a, sense_v or read_iout")
        if self.temp_c is not None and self.read_temperature_1 is not None:
            raise ValueError("give temp_c or read_temperature_1, not both")
        return self


def epoch_seconds(value: object) -> float:
    """RFC 3339 with an offset, or epoch seconds; naive times are refused (their zone is a
    guess, and telemetry must never carry a guessed time)."""
    if isinstance(value, bool):
        raise ValueError("time must be RFC 3339 with an offset or epoch seconds")
    if isinstance(value, int | float):
        seconds = float(value)
    elif isinstance(value, str):
        try:
            moment = datetime.fromisoformat(value)
        except ValueError:
            raise ValueError(f"time '{value}' is not RFC 3339") from None
        if moment.tzinfo is None:
            raise ValueError("time needs a UTC offset (e.g. +00:00 or Z)")
        seconds = moment.timestamp()
    else:
        raise ValueError("time must be RFC 3339 with an offset or epoch seconds")
    if not 0.0 < seconds < EPOCH_MAX_S:
        raise ValueError(f"time {seconds} s is outside 1970..5138 (milliseconds sent as seconds?)")
    return seconds


Timestamp = Annotated[
    float,
    BeforeValidator(epoch_seconds),
    WithJsonSchema(
        {"anyOf": [{"type": "string", "format": "date-time"}, {"type": "number"}],
         "description": "RFC 3339 with an offset, or epoch seconds"}
    ),
]  # fmt: skip


class SampleIn(Contract):
    time: Timestamp
    seq: Annotated[int, _within(SEQ_RANGE)]
    vin_v: Volts | None = Field(default=None, description="else every phase's read_vin")
    vout_v: Volts | None = Field(default=None, description="else every phase's read_vout")
    iout_a: Amps | None = None
    iin_a: Annotated[float, _within(INPUT_AMPS_RANGE)] | None = Field(
        default=None, description="input current, A"
    )
    ambient_c: Celsius | None = None
    phases: list[PhaseReading] = Field(min_length=1, max_length=MAX_PHASES)


SAMPLES = TypeAdapter(list[SampleIn])
BODY_SCHEMA = TypeAdapter(SampleIn | list[SampleIn]).json_schema(
    ref_template="#/components/schemas/{model}"
)
# The models the body schema refers to, for the OpenAPI document's components (a "$defs" left
# inside an operation would not resolve from the document's root).
BODY_COMPONENTS: dict[str, Any] = BODY_SCHEMA.pop("$defs")


STATUS_WORDS = (
    "status_word", "status_iout", "status_temperature", "status_input", "status_vout",
)  # fmt: skip


def reading_flags(
    named: npt.NDArray[np.bool_], status: npt.NDArray[np.int64]
) -> npt.NDArray[np.uint8]:
    """The stored flag byte of each reading: the named flags (a column each, in ``FLAG_NAMES``
    order) or'ed with what its PMBus status words say (a column each, in ``STATUS_WORDS``
    order, NO_WORD where not given). Whole matrices at once: per column, the fixed cost of
    numpy's calls was most of a single sample's."""
    bits = np.array(list(FLAG_NAMES.values()), dtype=np.uint8)  # distinct: their sum is an or
    flags: npt.NDArray[np.uint8] = (named.astype(np.uint8) * bits).sum(axis=1, dtype=np.uint8)
    given = status != NO_WORD
    if not given.any():  # the common case: no status words at all
        return flags
    words = dict(zip(STATUS_WORDS, np.where(given, status, 0).T, strict=True))
    word = status_word_flags(words["status_word"])
    iout = status_iout_flags(words["status_iout"])
    hot = status_temperature_flags(words["status_temperature"])
    inputs = status_input_flags(words["status_input"])
    vout = status_vout_flags(words["status_vout"])
    # UNIT_OFF_LOW_VIN: the stage stopped switching, the hardware has acted.
    off = word["OFF"] | inputs["UNIT_OFF_LOW_VIN"]
    over = word["IOUT_OC_FAULT"] | iout["IOUT_OC_FAULT"] | inputs["IIN_OC_FAULT"]
    warm = word["TEMPERATURE"] | hot["OT_FAULT"] | hot["OT_WARNING"]
    vout_fault = vout["VOUT_OV_FAULT"] | vout["VOUT_UV_FAULT"]
    for set_, bit in (
        (off, FLAG_DRIVER_OFF), (over, FLAG_OVERCURRENT), (warm, FLAG_OVERTEMP),
        (vout_fault, FLAG_VOUT_FAULT),
    ):  # fmt: skip
        flags |= np.where(set_, bit, 0).astype(np.uint8)
    return flags


_SAMPLE_FIELDS = ("time", "vin_v", "vout_v", "iout_a", "iin_a", "ambient_c")
_READING_WORDS = ("read_iout", "read_vin", "read_iin", "read_vout", "read_temperature_1")
_READING_FIELDS = (
    "index", "current_a", "sense_v", "temp_c", *_READING_WORDS, *STATUS_WORDS, *FLAG_NAMES,
)  # fmt: skip


def to_incoming(items: list[SampleIn]) -> IncomingSamples:
    """Long-form arrays for the monitor (one row per phase reading). The fields are read into
    one table per level and converted by numpy at once (None becomes NaN, a flag 0 or 1): for
    a fleet's single samples, an array per field paid numpy's fixed cost some forty times."""
    per_sample = np.array(
        [attrgetter(*_SAMPLE_FIELDS)(s) for s in items], dtype=np.float64
    ).reshape(-1, len(_SAMPLE_FIELDS))
    counts = np.array([len(s.phases) for s in items], dtype=np.int64)
    get = attrgetter(*_READING_FIELDS)
    table = np.array([get(r) for s in items for r in s.phases], dtype=np.float64).reshape(
        -1, len(_READING_FIELDS)
    )
    column = dict(zip(_READING_FIELDS, table.T, strict=True))
    flags_at = _READING_FIELDS.index(next(iter(FLAG_NAMES)))
    words_at = _READING_FIELDS.index(_READING_WORDS[0])
    block = table[:, words_at:flags_at]  # every word, then every status word
    words = np.where(np.isnan(block), NO_WORD, block).astype(np.int64)  # exact: <= 16 bits
    word = dict(zip(_READING_WORDS + STATUS_WORDS, words.T, strict=True))
    flags = reading_flags(table[:, flags_at:] == 1.0, words[:, len(_READING_WORDS) :])
    t_s, vin_v, vout_v, iout_a, iin_a, ambient_c = per_sample.T
    return IncomingSamples(
        seq=np.array([s.seq for s in items], dtype=np.int64),
        t_s=t_s, vin_v=vin_v, vout_v=vout_v, iout_a=iout_a,
        iin_a=iin_a, ambient_c=ambient_c,
        item=np.repeat(np.arange(len(items), dtype=np.int64), counts),
        slot=np.arange(len(table), dtype=np.int64) - np.repeat(np.cumsum(counts) - counts, counts),
        phase=column["index"].astype(np.int64),
        current_a=column["current_a"], sense_v=column["sense_v"],
        iout_word=word["read_iout"], vin_word=word["read_vin"],
        iin_word=word["read_iin"], vout_word=word["read_vout"],
        temp_word=word["read_temperature_1"],
        temp_c=column["temp_c"], flags=flags,
    )  # fmt: skip


class IngestOut(Contract):
    stored: int
    duplicates: int
    late: int
    rejected: list[dict[str, str | None]] = Field(
        default_factory=list,
        description="Always empty on success: a batch with any bad item is refused whole (4xx).",
    )
    condition: str | None
    version: int
    waiting: int = 0


class SampleWindow(Contract):
    """Stored samples, oldest first; per-phase lists are indexed by phase (None: not reported).
    Each sample names the definition version it was taken under and that version's phase
    count; across versions with different counts the lists are as long as the most phases."""

    rail_id: str
    count: int
    truncated: bool
    seq: list[int]
    time_s: list[float]
    version: list[int]
    phase_count: list[int]
    vin_v: list[float]
    vout_v: list[float]
    iout_a: list[float | None]
    iin_a: list[float | None]
    ambient_c: list[float | None]
    current_a: list[list[float | None]]
    temp_c: list[list[float | None]]
    flags: list[list[int]]


class Spread(Contract):
    min: float | None
    max: float | None
    mean: float | None


class PhaseSpread(Contract):
    min: list[float | None]
    max: list[float | None]
    mean: list[float | None]


class HistoryRow(Contract):
    t_start_s: float
    t_end_s: float
    count: int
    reduced: bool = Field(description="true: from the summary kept after retention")
    vin_v: Spread
    vout_v: Spread
    current_a: PhaseSpread
    temp_c: PhaseSpread


class HistoryOut(Contract):
    rail_id: str
    interval_s: float
    truncated: bool
    rows: list[HistoryRow]
