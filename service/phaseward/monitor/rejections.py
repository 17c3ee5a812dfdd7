"""Refused batches as episodes: one ``telemetry.rejected`` event per episode, not per refusal.

The first refusal on a rail opens an episode: a warning event stamped with that refusal's
time. Every further refusal within ``EPISODE_QUIET_S`` of the previous one belongs to the same
episode and updates that event in place: the counts of batches and samples refused, the first
and the last error (field, error, detail, time), the span from first to last refusal, and the
count per field named. A quiet period of ``EPISODE_QUIET_S`` without refusals ends the episode;
the next refusal opens a new event. Accepted batches in between do not end it: a client that
alternates good and bad batches is one misbehaving client, and ending on every accepted batch
would bring back one event per refusal. Exact counts per process are in ``/metrics``.
"""

from __future__ import annotations

import time
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import PhasewardError
from phaseward.store import events, rails
from phaseward.store.db import transaction

KIND = "telemetry.rejected"
EPISODE_QUIET_S = 300.0  # a refusal this long after the previous one opens a new episode
MAX_FIELDS = 20  # distinct fields counted per episode (the rest under "other")


def record_rejection(
    sessions: sessionmaker[Session], rail_id: str, *, samples: int, error: PhasewardError
) -> None:
    """Count a refused batch of a known rail into its episode, in its own transaction."""
    now_s = time.time()
    with transaction(sessions) as session:
        rail = rails.get(session, rail_id, for_update=True)  # one episode writer per rail
        if rail is None:
            return
        refusal = {"t_s": now_s, "field": error.field, "error": error.error, "detail": error.detail}
        open_ = _open_episode(session, rail_id, now_s)
        if open_ is None:
            details = _details(refusal, samples=samples)
            events.add_many(session, [{
                "rail_id": rail_id, "version": rail.version, "t_s": now_s, "kind": KIND,
                "severity": "warning", "phase": None, "message": _message(details),
                "details": details,
            }])  # fmt: skip
            return
        details = _counted(open_.details, refusal, samples=samples)
        open_.details = details
        open_.message = _message(details)


def _open_episode(session: Session, rail_id: str, now_s: float) -> Any:
    event = events.newest_of_kind(session, rail_id, KIND)
    if event is None or "last" not in event.details:  # none, or one from before episodes
        return None
    if now_s - float(event.details["last"]["t_s"]) > EPISODE_QUIET_S:
        return None
    return event


def _details(refusal: dict[str, Any], *, samples: int) -> dict[str, Any]:
    return {
        "batches": 1,
        "samples": samples,
        "first": refusal,
        "last": refusal,
        "span_s": 0.0,
        "fields": {str(refusal["field"]): 1},
        # Kept for readers of single-refusal events: the first refusal's field and error.
        "field": refusal["field"],
        "error": refusal["error"],
    }


def _counted(old: dict[str, Any], refusal: dict[str, Any], *, samples: int) -> dict[str, Any]:
    fields = dict(old["fields"])
    key = str(refusal["field"])
    if key not in fields and len(fields) >= MAX_FIELDS:
        key = "other"
    fields[key] = fields.get(key, 0) + 1
    return old | {
        "batches": int(old["batches"]) + 1,
        "samples": int(old["samples"]) + samples,
        "last": refusal,
        "span_s": refusal["t_s"] - float(old["first"]["t_s"]),
        "fields": fields,
    }


def _message(d: dict[str, Any]) -> str:
    last = d["last"]
    if d["batches"] == 1:
        return f"batch of {d['samples']} samples refused: {last['detail']}"
    return (
        f"{d['batches']} batches ({d['samples']} samples) refused over {d['span_s']:.0f} s; "
        f"last: {last['detail']}"
    )
