"""Fault captures: waveforms around a trip, one per ``phase.isolated`` event."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from sqlalchemy import select
from sqlalchemy.orm import Session

from phaseward.store.models import FaultCapture

F64 = npt.NDArray[np.float64]


@dataclass(frozen=True)
class CaptureArrays:
    """t_s (seconds from the trigger), vin_v, vout_v, iin_a: (n,); current_a, switch_v,
    gate_v: (n, n_phases). Optional channels are None when the capture has none."""

    source_format: str
    t_s: F64
    vin_v: F64
    vout_v: F64
    current_a: F64
    iin_a: F64 | None = None
    switch_v: F64 | None = None
    gate_v: F64 | None = None


def channels(source: CaptureArrays | FaultCapture) -> list[str]:
    """The channels a capture holds, by name."""
    optional = [
        name for name in ("iin_a", "switch_v", "gate_v") if getattr(source, name) is not None
    ]
    return ["t_s", "vin_v", "vout_v", "current_a", *optional]


def _blob(values: F64 | None) -> bytes | None:
    return None if values is None else np.ascontiguousarray(values, "<f8").tobytes()


def add(
    session: Session, *, rail_id: str, event_id: int, capture: CaptureArrays, now_s: float
) -> int:
    n, p = capture.current_a.shape
    row = FaultCapture(
        rail_id=rail_id, event_id=event_id, created_s=now_s, source_format=capture.source_format,
        n_samples=n, n_phases=p, t_s=_blob(capture.t_s), vin_v=_blob(capture.vin_v),
        vout_v=_blob(capture.vout_v), iin_a=_blob(capture.iin_a),
        current_a=_blob(capture.current_a), switch_v=_blob(capture.switch_v),
        gate_v=_blob(capture.gate_v),
    )  # fmt: skip
    session.add(row)
    session.flush()
    return row.id


def of_event(session: Session, event_id: int) -> FaultCapture | None:
    return session.scalars(select(FaultCapture).where(FaultCapture.event_id == event_id)).first()
