"""Fault class of an isolated phase, decided once enough samples after the event are stored.

An isolation is judged from the samples around it (physics.signatures); the samples after it
usually arrive in later requests, so the live state keeps a list of isolations still waiting,
and each ingest classifies those whose window is complete and writes the class, the evidence
and the confidence into the ``phase.isolated`` event.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from phaseward.monitor.rail_model import RailModel
from phaseward.physics.signatures import (
    SAMPLES_AFTER,
    SAMPLES_BEFORE,
    Signature,
    classify_isolation,
)
from phaseward.store import events, samples

BASELINE_SAMPLES = SAMPLES_BEFORE + 3  # a few more than the minimum for a steadier median


def waiting(
    pending: list[dict[str, Any]], findings: list[tuple[float, int]]
) -> list[dict[str, Any]]:
    """The pending list with the isolations of this batch, (time, phase) each, appended."""
    return pending + [{"t_s": t, "phase": p} for t, p in findings]


def settle(
    session: Session, model: RailModel, pending: list[dict[str, Any]]
) -> list[dict[str, Any]]:
    """Classify every pending isolation whose window is complete; return those still waiting."""
    still: list[dict[str, Any]] = []
    for item in pending:
        rows = samples.around(
            session, model.rail_id, t_s=item["t_s"], before=BASELINE_SAMPLES, after=SAMPLES_AFTER
        )
        after = int((rows.t_s > item["t_s"]).sum())
        if after < SAMPLES_AFTER:
            still.append(item)
            continue
        phase = int(item["phase"])
        current = np.nan_to_num(rows.current_a, nan=0.0)
        others = np.delete(current, phase, axis=1).sum(axis=1)
        try:
            signature = classify_isolation(
                rows.t_s, rows.vin_v, rows.vout_v, current[:, phase], others,
                int(np.searchsorted(rows.t_s, item["t_s"])),
                vin_nominal_v=model.vin_v, vout_nominal_v=model.vout_v,
            )  # fmt: skip
        except ValueError as err:  # e.g. two samples at one instant: say so, keep ingesting
            signature = Signature(kind="undetermined", confidence=0.0, reason=str(err))
        events.attach_signature(
            session,
            rail_id=model.rail_id,
            phase=phase,
            t_s=float(item["t_s"]),
            signature={
                "kind": signature.kind,
                "confidence": round(signature.confidence, 3),
                "evidence": {k: round(float(v), 4) for k, v in signature.evidence.items()},
                "reason": signature.reason,
            },
        )
    return still
