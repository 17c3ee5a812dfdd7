"""Shared schema pieces."""

from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field


class Contract(BaseModel):
    """Base of every request model: unknown fields and NaN/Infinity are rejected."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, frozen=True)


class ErrorBody(BaseModel):
    error: str
    detail: str
    field: str | None = None


Positive = Annotated[float, Field(gt=0)]
NonNegative = Annotated[float, Field(ge=0)]
Celsius = Annotated[float, Field(ge=-273.15, le=1000)]

CAUTION = (
    "phaseward is a monitoring aid: hardware protection stays in hardware, and local codes "
    "and licensed practice govern any decision to keep running degraded equipment."
)
