"""Fault class of an isolated phase, written into its ``phase.isolated`` event.

From telemetry samples alone the class cannot be told: a breaker ends the fault within
microseconds to milliseconds, long before the next sample, so ingest writes ``undetermined``
with the reason and the sample interval (physics.signatures.too_slow). A capture uploaded for
the event (:func:`attach_capture`) is classified with the rail's thresholds, stored beside the
event, and its class and evidence replace the answer in the event.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import Conflict, InvalidInput, NotFound
from phaseward.monitor import rail_model
from phaseward.monitor.rail_model import RailModel
from phaseward.physics.signatures import Signature, classify_capture, too_slow
from phaseward.store import captures, events, rails, samples
from phaseward.store.captures import CaptureArrays
from phaseward.store.db import transaction


def details(signature: Signature, *, source: str, capture_id: int | None = None) -> dict[str, Any]:
    """The signature as the event shows it (JSON: NaN features, channels absent, become None)."""
    out: dict[str, Any] = {
        "kind": signature.kind,
        "confidence": round(signature.confidence, 3),
        "source": source,
        "evidence": {
            k: round(float(v), 4) if np.isfinite(v) else None for k, v in signature.evidence.items()
        },
        "used": list(signature.used),
        "reason": signature.reason,
    }
    if capture_id is not None:
        out["capture_id"] = capture_id
    return out


def settle(session: Session, model: RailModel, isolations: list[tuple[float, int]]) -> None:
    """Write the samples-only answer into the events of this batch's isolations, (time, phase)
    each: undetermined, with the interval from the sample before (a rail's very first sample
    has none: the reason says so)."""
    for t_s, phase in isolations:
        rows = samples.around(session, model.rail_id, t_s=t_s, before=1, after=0)
        earlier = rows.t_s[rows.t_s < t_s]
        signature = (
            too_slow(t_s - float(earlier[-1]))
            if earlier.size
            else Signature(
                "undetermined", 0.0, reason="no sample before the trip; attach a capture"
            )
        )
        events.attach_signature(
            session, rail_id=model.rail_id, phase=phase, t_s=t_s,
            signature=details(signature, source="samples"),
        )  # fmt: skip


@dataclass(frozen=True)
class CaptureResult:
    capture_id: int
    event_id: int
    rail_id: str
    phase: int
    n_samples: int
    n_phases: int
    channels: list[str]
    signature: dict[str, Any]


def classify(model: RailModel, capture: CaptureArrays, phase: int) -> Signature:
    """The capture's answer for ``phase`` with the rail's thresholds; the phase's gate signal,
    else its switch node, is the drive channel."""
    drive = capture.gate_v if capture.gate_v is not None else capture.switch_v
    try:
        return classify_capture(
            capture.t_s, capture.current_a, capture.vin_v, capture.vout_v, phase=phase,
            vin_nominal_v=model.vin_v, vout_nominal_v=model.vout_v,
            fsw_hz=float(model.losses.fsw_hz[phase]),
            inductance_h=float(model.losses.inductance_h[phase]), iin_a=capture.iin_a,
            drive_v=None if drive is None else drive[:, phase], rules=model.evidence,
        )  # fmt: skip
    except ValueError as err:
        raise InvalidInput(f"the capture cannot be judged: {err}", field="body") from err


def attach_capture(
    sessions: sessionmaker[Session], *, rail_id: str, event_id: int, capture: CaptureArrays
) -> CaptureResult:
    """Store the capture for the event, classify it, and write the answer into the event."""
    with transaction(sessions) as session:
        event = events.get(session, event_id)
        if event is None or event.rail_id != rail_id:
            raise NotFound(f"no event {event_id} on rail '{rail_id}'", field="event_id")
        if event.kind != "phase.isolated" or event.phase is None:
            raise InvalidInput(
                f"a capture belongs to a phase.isolated event; event {event_id} is {event.kind}",
                field="event_id",
            )
        existing = captures.of_event(session, event_id)
        if existing is not None:
            raise Conflict(f"event {event_id} has capture {existing.id} already", field="event_id")
        model = rail_model.build(
            rail_id, event.version, rails.spec(session, rail_id, event.version)
        )
        n_phases = capture.current_a.shape[1]
        if n_phases != model.n_phases:
            raise InvalidInput(
                f"the capture has {n_phases} phase currents; rail '{rail_id}' (version "
                f"{event.version}) has {model.n_phases} phases",
                field="body",
            )
        signature = classify(model, capture, event.phase)
        capture_id = captures.add(
            session, rail_id=rail_id, event_id=event_id, capture=capture, now_s=time.time()
        )
        shown = details(signature, source="capture", capture_id=capture_id)
        event.details = {**event.details, "signature": shown}
        return CaptureResult(
            capture_id=capture_id, event_id=event_id, rail_id=rail_id, phase=event.phase,
            n_samples=int(capture.t_s.size), n_phases=n_phases, channels=captures.channels(capture),
            signature=shown,
        )  # fmt: skip


def capture_of(session: Session, rail_id: str, event_id: int) -> CaptureResult:
    """The stored capture of an event, with the answer the event shows."""
    event = events.get(session, event_id)
    row = captures.of_event(session, event_id)
    if event is None or event.rail_id != rail_id or row is None or event.phase is None:
        raise NotFound(f"no capture for event {event_id} on rail '{rail_id}'", field="event_id")
    return CaptureResult(
        capture_id=row.id, event_id=event_id, rail_id=rail_id, phase=event.phase,
        n_samples=row.n_samples, n_phases=row.n_phases, channels=captures.channels(row),
        signature=event.details.get("signature", {}),
    )  # fmt: skip
