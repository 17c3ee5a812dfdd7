"""Rehearsals: replay a recorded trace against candidate protection settings, as a job.

The grid is scored by physics.rehearsal in chunks of combinations (each chunk one vectorised
pass), so the job can report its progress; a single combination also lists every trip.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import numpy.typing as npt
from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import InvalidInput
from phaseward.monitor import rails as rail_service
from phaseward.monitor import traces
from phaseward.monitor.jobs import Progress
from phaseward.physics.rehearsal import (
    RULES,
    SETTING_NAMES,
    FaultLabels,
    ProtectionGrid,
    RehearsalTrace,
    pareto_front,
    rehearse,
    sweep,
)
from phaseward.store import samples

KIND = "rehearsal"
MAX_COMBINATIONS = 10_000
CHUNK = 1_000  # combinations per vectorised pass, so progress moves
MAX_WINDOW_SAMPLES = 500_000


def grid_size(settings: dict[str, float | list[float]]) -> int:
    return math.prod(len(v) if isinstance(v, list) else 1 for v in settings.values())


def rail_of(request: dict[str, Any]) -> str | None:
    """The rail whose samples a stored rehearsal request replays (None for an uploaded trace,
    which belongs to no rail)."""
    rail: str | None = request["trace"].get("rail_id")
    return rail


def _trace(session: Session, spec: dict[str, Any]) -> RehearsalTrace:
    if "trace_id" in spec:
        t = traces.load(session, int(spec["trace_id"]))
        return RehearsalTrace(t.t_s, t.current_a, t.temp_c, t.vin_v)
    rail_service.get(session, spec["rail_id"])
    rows = samples.window(
        session, spec["rail_id"], start_s=spec["since"], end_s=spec["until"],
        limit=MAX_WINDOW_SAMPLES,
    )  # fmt: skip
    if rows.t_s.size < 2:
        raise InvalidInput("the window holds fewer than two samples", field="trace")
    if np.unique(rows.phase_count).size > 1:
        versions = ", ".join(str(v) for v in np.unique(rows.version))
        raise InvalidInput(
            f"the window spans definition versions {versions} with different phase counts; "
            "rehearse each version's part of it on its own",
            field="trace",
        )
    current = np.nan_to_num(rows.current_a, nan=0.0)  # a phase not reported carries nothing
    return RehearsalTrace(rows.t_s, current, rows.temp_c, rows.vin_v)


def run(
    sessions: sessionmaker[Session], request: dict[str, Any], progress: Progress
) -> dict[str, Any]:
    """The job handler: every combination's trips, false trips, latencies and misses, the
    Pareto front of false trips against the worst detection latency, and for a single
    combination the list of trips."""
    with sessions() as session, session.begin():
        trace = _trace(session, request["trace"])
    axes = {k: v for k, v in request["settings"].items() if v is not None}
    grid = ProtectionGrid.product(axes)
    labels_in = request.get("labels") or []
    labels = FaultLabels(
        [lb["start_s"] for lb in labels_in], [lb["end_s"] for lb in labels_in],
        np.array([lb["phase"] for lb in labels_in], dtype=np.intp),
        [lb["kind"] for lb in labels_in],
    )  # fmt: skip
    parts = []
    for lo in range(0, grid.size, CHUNK):
        hi = min(lo + CHUNK, grid.size)
        chunk = ProtectionGrid({name: col[lo:hi] for name, col in grid.columns.items()})
        parts.append(sweep(trace, chunk, labels))
        progress(100.0 * hi / grid.size)

    def stack(name: str) -> npt.NDArray[Any]:
        return np.concatenate([getattr(p, name) for p in parts])

    false_trips, max_latency = stack("false_trips"), stack("max_latency_s")
    trips, by_rule, missed = stack("trips"), stack("trips_by_rule"), stack("missed")
    mean_latency, latency = stack("mean_latency_s"), stack("latency_s")
    names = [n for n in SETTING_NAMES if n in axes]
    rows = [
        {
            "index": c,
            "settings": {n: float(grid.columns[n][c]) for n in names},
            "trips": int(trips[c]),
            "trips_by_rule": dict(zip(RULES, by_rule[c].tolist(), strict=True)),
            "false_trips": int(false_trips[c]),
            "missed": int(missed[c]),
            "mean_latency_s": _finite(mean_latency[c]),
            "max_latency_s": _finite(max_latency[c]),
            "latency_s": [_finite(x) for x in latency[c]],
        }
        for c in range(grid.size)
    ]
    result: dict[str, Any] = {
        "combinations": grid.size,
        "axes": names,
        "labels": len(labels_in),
        "rows": rows,
        "pareto": pareto_front(false_trips, max_latency).tolist(),
        "trips": None,
    }
    if grid.size == 1:
        result["trips"] = [
            {"time_s": t.time_s, "phase": t.phase, "rule": t.rule, "value": t.value}
            for t in rehearse(trace, grid.settings(0))
        ]
    return result


def _finite(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None
