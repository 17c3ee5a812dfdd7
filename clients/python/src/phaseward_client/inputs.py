"""What the client sends: samples, forecast loads and drops, breaker parameters.

Every ``to_json`` refuses what the service would refuse anyway and a client can know first:
NaN or infinite numbers (JSON has no such values), a naive ``datetime`` (its zone would be a
guess), a phase reading with not exactly one current source.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

JsonObject = dict[str, Any]


def finite(value: float, name: str) -> float:
    """``value`` as a float, or ValueError naming ``name`` if it is NaN, infinite or no number."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise TypeError(f"{name} must be a number, not {type(value).__name__}")
    number = float(value)
    if not math.isfinite(number):
        raise ValueError(f"{name} must be finite, not {number}")
    return number


def timestamp(value: float | datetime | str, name: str = "time") -> float | str:
    """Epoch seconds as a float, an aware ``datetime`` as RFC 3339, a string as given."""
    if isinstance(value, datetime):
        if value.tzinfo is None or value.utcoffset() is None:
            raise ValueError(f"{name} needs a timezone (a naive datetime would be a guess)")
        return value.isoformat()
    if isinstance(value, str):
        return value
    return finite(value, name)


@dataclass(frozen=True)
class PhaseReading:
    """One phase in one sample. Give the current as exactly one of ``current_a`` (amperes),
    ``sense_v`` (volts across the inductor DCR) or ``read_iout`` (a raw LINEAR11 word). Raw
    PMBus words and status bytes (``read_vin`` .. ``status_temperature``) are decoded by the
    service."""

    index: int
    current_a: float | None = None
    sense_v: float | None = None
    read_iout: int | None = None
    temp_c: float | None = None
    breaker_tripped: bool = False
    driver_disabled: bool = False
    overcurrent: bool = False
    overtemperature: bool = False
    vout_fault: bool = False
    status_word: int | None = None
    read_vin: int | None = None
    read_iin: int | None = None
    read_vout: int | None = None
    read_temperature_1: int | None = None
    status_iout: int | None = None
    status_temperature: int | None = None
    status_input: int | None = None
    status_vout: int | None = None

    def to_json(self) -> JsonObject:
        given = [v is not None for v in (self.current_a, self.sense_v, self.read_iout)]
        if sum(given) != 1:
            raise ValueError(
                f"phase {self.index}: give exactly one of current_a, sense_v or read_iout"
            )
        out: JsonObject = {"index": int(self.index)}
        if self.current_a is not None:
            out["current_a"] = finite(self.current_a, f"phase {self.index} current_a")
        if self.sense_v is not None:
            out["sense_v"] = finite(self.sense_v, f"phase {self.index} sense_v")
        if self.read_iout is not None:
            out["read_iout"] = int(self.read_iout)
        if self.temp_c is not None:
            out["temp_c"] = finite(self.temp_c, f"phase {self.index} temp_c")
        for flag in (
            "breaker_tripped", "driver_disabled", "overcurrent", "overtemperature", "vout_fault",
        ):  # fmt: skip
            if getattr(self, flag):
                out[flag] = True
        for word in _WORDS:
            if (value := getattr(self, word)) is not None:
                out[word] = int(value)
        return out


_WORDS = ("status_word", "read_vin", "read_iin", "read_vout", "read_temperature_1",
          "status_iout", "status_temperature", "status_input", "status_vout")  # fmt: skip


@dataclass(frozen=True)
class Sample:
    """One telemetry sample of a rail. ``time``: epoch seconds, an aware ``datetime`` or an
    RFC 3339 string; ``seq``: the sample's sequence number (a batching sender assigns one when
    it is None). ``vin_v`` / ``vout_v`` may be None when every phase gives ``read_vin`` /
    ``read_vout``; ``iin_a`` is the input current."""

    time: float | datetime | str
    vin_v: float | None
    vout_v: float | None
    phases: Sequence[PhaseReading]
    seq: int | None = None
    iout_a: float | None = None
    ambient_c: float | None = None
    iin_a: float | None = None

    def to_json(self) -> JsonObject:
        if self.seq is None:
            raise ValueError("the sample has no seq (a BatchingSender assigns one)")
        out: JsonObject = {
            "time": timestamp(self.time),
            "seq": int(self.seq),
            "phases": [p.to_json() for p in self.phases],
        }
        for name in ("vin_v", "vout_v", "iout_a", "ambient_c", "iin_a"):
            if (value := getattr(self, name)) is not None:
                out[name] = finite(value, name)
        return out


SampleLike = Sample | Mapping[str, Any]
"""A ``Sample`` or the service's JSON sample as a mapping (sent as given)."""


def sample_json(sample: SampleLike) -> JsonObject:
    return sample.to_json() if isinstance(sample, Sample) else dict(sample)


@dataclass(frozen=True)
class LoadPoint:
    at_s: float
    current_a: float

    def to_json(self) -> JsonObject:
        return {"at_s": finite(self.at_s, "at_s"), "current_a": finite(self.current_a, "current_a")}


@dataclass(frozen=True)
class Load:
    """A forecast load: use ``Load.constant``, ``Load.steps`` (each value holds until the next)
    or ``Load.points`` (linear in between)."""

    constant_a: float | None = None
    steps: Sequence[LoadPoint] | None = None
    points: Sequence[LoadPoint] | None = None

    @classmethod
    def constant(cls, current_a: float) -> Load:
        return cls(constant_a=current_a)

    @classmethod
    def stepwise(cls, *steps: tuple[float, float]) -> Load:
        """``Load.stepwise((0, 150), (600, 190))``: (at_s, current_a) pairs."""
        return cls(steps=[LoadPoint(t, a) for t, a in steps])

    @classmethod
    def linear(cls, *points: tuple[float, float]) -> Load:
        return cls(points=[LoadPoint(t, a) for t, a in points])

    def to_json(self) -> JsonObject:
        given = [x is not None for x in (self.constant_a, self.steps, self.points)]
        if sum(given) != 1:
            raise ValueError("give exactly one of constant_a, steps or points")
        if self.constant_a is not None:
            return {"constant_a": finite(self.constant_a, "constant_a")}
        if self.steps is not None:
            return {"steps": [p.to_json() for p in self.steps]}
        assert self.points is not None
        return {"points": [p.to_json() for p in self.points]}


@dataclass(frozen=True)
class PhaseDrop:
    """Take ``phase`` out of service ``at_s`` seconds into a forecast."""

    phase: int
    at_s: float = 0.0

    def to_json(self) -> JsonObject:
        return {"phase": int(self.phase), "at_s": finite(self.at_s, "at_s")}


@dataclass(frozen=True)
class FosterStage:
    r_k_per_w: float
    tau_s: float

    def to_json(self) -> JsonObject:
        return {
            "r_k_per_w": finite(self.r_k_per_w, "r_k_per_w"),
            "tau_s": finite(self.tau_s, "tau_s"),
        }


@dataclass(frozen=True)
class SoaPoint:
    """A point of the safe-operating-area curve at the breaker's input voltage."""

    time_s: float
    current_a: float

    def to_json(self) -> JsonObject:
        return {
            "time_s": finite(self.time_s, "time_s"),
            "current_a": finite(self.current_a, "current_a"),
        }


@dataclass(frozen=True)
class BreakerParams:
    """The hot-swap pass MOSFET of one phase while it limits a downstream short."""

    vin_v: float
    current_limit_a: float
    delay_s: float
    foster: Sequence[FosterStage]
    soa: Sequence[SoaPoint]
    start_temp_c: float | None = None
    junction_limit_c: float | None = None
    curve_points: int | None = None

    def to_json(self) -> JsonObject:
        out: JsonObject = {
            "vin_v": finite(self.vin_v, "vin_v"),
            "current_limit_a": finite(self.current_limit_a, "current_limit_a"),
            "delay_s": finite(self.delay_s, "delay_s"),
            "foster": [s.to_json() for s in self.foster],
            "soa": [p.to_json() for p in self.soa],
        }
        if self.start_temp_c is not None:
            out["start_temp_c"] = finite(self.start_temp_c, "start_temp_c")
        if self.junction_limit_c is not None:
            out["junction_limit_c"] = finite(self.junction_limit_c, "junction_limit_c")
        if self.curve_points is not None:
            out["curve_points"] = int(self.curve_points)
        return out
