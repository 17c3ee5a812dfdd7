"""Events as clients see them."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Annotated, Any

from pydantic import BaseModel, Field

from phaseward.api.schemas.common import Contract
from phaseward.store.models import Event

SEVERITIES = ("info", "warning", "critical")


def iso(t_s: float) -> str:
    return datetime.fromtimestamp(t_s, tz=UTC).isoformat()


class EventOut(BaseModel):
    id: int
    rail_id: str
    version: int
    time: str
    time_s: float
    kind: str
    severity: str
    phase: int | None
    message: str
    details: dict[str, Any]
    acked_by: str | None
    acked_key: str | None = Field(description="the name of the access key that acknowledged")
    ack_note: str | None
    acked_at: str | None

    @classmethod
    def of(cls, e: Event) -> EventOut:
        return cls(
            id=e.id, rail_id=e.rail_id, version=e.version, time=iso(e.t_s), time_s=e.t_s,
            kind=e.kind, severity=e.severity, phase=e.phase, message=e.message,
            details=e.details, acked_by=e.acked_by, acked_key=e.acked_key, ack_note=e.ack_note,
            acked_at=None if e.acked_s is None else iso(e.acked_s),
        )  # fmt: skip


class EventPage(BaseModel):
    items: list[EventOut]
    next_cursor: str | None = Field(description="pass as ?cursor= for the next (older) page")


class AckIn(Contract):
    by: Annotated[str, Field(min_length=1, max_length=120)]
    note: Annotated[str, Field(max_length=2000)] | None = None


CSV_COLUMNS = (
    "id",
    "time",
    "rail_id",
    "version",
    "kind",
    "severity",
    "phase",
    "message",
    "acked_by",
    "acked_key",
)

# A spreadsheet runs a cell beginning with one of these as a formula (OWASP, "CSV Injection").
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def csv_cell(value: object) -> object:
    """A text cell that a spreadsheet would take for a formula, prefixed with a single quote
    so it shows as text (the OWASP guidance on CSV injection); numbers pass as they are."""
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        return "'" + value
    return value
