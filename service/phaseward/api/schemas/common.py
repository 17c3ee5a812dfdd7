"""Shared schema pieces."""

from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field


class Contract(BaseModel):
    """Base of every request model: unknown fields and NaN/Infinity are rejected."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, frozen=True, strict=True)


class ErrorBody(BaseModel):
    error: str
    detail: str
    field: str | None = None


MAX_ROW_ID = 2**63 - 1  # ids are signed 64-bit in both databases; larger ones cannot be bound


def is_row_id(text: str) -> bool:
    """ASCII digits of an id the database can hold (str.isdigit alone also takes "²")."""
    return text.isascii() and text.isdigit() and int(text) <= MAX_ROW_ID


Positive = Annotated[float, Field(gt=0)]
NonNegative = Annotated[float, Field(ge=0)]
CELSIUS_RANGE = (-273.15, 1000.0)  # a reading below absolute zero is no reading
Celsius = Annotated[float, Field(ge=CELSIUS_RANGE[0], le=CELSIUS_RANGE[1])]
# Thermal time constants and pulse times: from a nanosecond (a subnormal tau overflowed t / tau)
# to about eleven days; thermal resistances up to a million K/W. Far beyond real parts, and
# inside what float64 sums and ratios of them can hold (1e308 K/W overflowed a Zth sum).
Seconds = Annotated[float, Field(ge=1e-9, le=1e6)]
# Thermal resistances from a microkelvin per watt (below, a stage's capacitance tau / R
# overflowed the Foster to Cauer conversion).
KelvinPerWatt = Annotated[float, Field(ge=1e-6, le=1e6)]

CAUTION = (
    "phaseward is a monitoring aid: hardware protection stays in hardware, and local codes "
    "and licensed practice govern any decision to keep running degraded equipment."
)
