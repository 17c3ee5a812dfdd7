"""Rehearsals: replay a recorded trace against candidate protection settings, as a job.

Everything a request can get wrong is checked by :func:`submit` before a job exists (422
naming the field): the settings grid, the trace reference, the label phases and kinds. The
grid is then scored by physics.rehearsal in chunks of combinations (each chunk one vectorised
pass), so the job can report its progress; a single combination also lists every trip.
:func:`export` turns one row of a finished rehearsal into settings for firmware.
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt
from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import Conflict, InvalidInput, NotFound
from phaseward.monitor import rails as rail_service
from phaseward.monitor import traces
from phaseward.monitor.jobs import JobRunner, Progress
from phaseward.monitor.telemetry import ISOLATING_FLAGS
from phaseward.physics.rehearsal import (
    ANY_RULE,
    RAIL_PHASE,
    RULES,
    SETTING_NAMES,
    FaultLabels,
    ProtectionGrid,
    RehearsalTrace,
    hold_readings,
    pareto_front,
    rehearse,
    sweep,
)
from phaseward.store import jobs, samples
from phaseward.store import traces as trace_store
from phaseward.store.models import Job

KIND = "rehearsal"
MAX_COMBINATIONS = 10_000
CHUNK = 1_000  # combinations per vectorised pass, so progress moves
MAX_WINDOW_SAMPLES = 500_000
DEFAULT_HOLD_S = 1.0  # missing reading held this long by default (README; our choice)
# the setting whose level enables each rule (a label of that kind needs it somewhere)
RULE_LEVEL = {
    "over_current": "oc_level_a",
    "over_temperature": "ot_level_c",
    "imbalance": "imbalance_pct",
    "dead_phase": "dead_floor_a",
    "under_voltage": "uv_level_v",
}


def grid_size(settings: dict[str, float | list[float]]) -> int:
    return math.prod(len(v) if isinstance(v, list) else 1 for v in settings.values())


def rail_of(request: dict[str, Any]) -> str | None:
    """The rail whose samples a stored rehearsal request replays (None for an uploaded trace,
    which belongs to no rail)."""
    rail: str | None = request["trace"].get("rail_id")
    return rail


def hold_s(missing: dict[str, Any] | None) -> float:
    """The hold time of a request's missing-reading policy (0: a missing reading clears)."""
    missing = missing or {}
    if missing.get("policy", "hold") == "clear":
        return 0.0
    return float(missing.get("hold_s", DEFAULT_HOLD_S))


def _grid(settings: dict[str, Any]) -> ProtectionGrid:
    axes = {k: v for k, v in settings.items() if v is not None}
    size = grid_size(axes)
    if size > MAX_COMBINATIONS:
        counts = " x ".join(f"{k} ({len(v)})" for k, v in axes.items() if isinstance(v, list))
        raise InvalidInput(
            f"{counts} = {size} combinations, more than {MAX_COMBINATIONS}: sweep fewer values",
            field="settings",
        )
    try:
        return ProtectionGrid.product(axes)
    except ValueError as err:
        name = next((n for n in SETTING_NAMES if str(err).startswith(n)), None)
        raise InvalidInput(str(err), field=f"settings.{name}" if name else "settings") from err


def _phases(session: Session, spec: dict[str, Any]) -> int:
    """Phase count of the trace a request names; 422 when it names nothing stored."""
    if "trace_id" in spec:
        found = trace_store.shape(session, int(spec["trace_id"]))
        if found is None:
            raise InvalidInput(f"no trace {spec['trace_id']}", field="trace.trace_id")
        return found[1]
    rail_service.get(session, spec["rail_id"])
    makeup = samples.window_makeup(
        session, spec["rail_id"], start_s=spec["since"], end_s=spec["until"]
    )
    _check_window(
        sum(n for _, _, n in makeup), [p for p, _, _ in makeup], [v for _, v, _ in makeup]
    )
    return makeup[0][0]


def _check_window(n: int, phase_counts: Sequence[int], versions: Sequence[int]) -> None:
    """A stored window replays when it holds two samples or more of one phase count."""
    if n < 2:
        raise InvalidInput("the window holds fewer than two samples", field="trace")
    if len(set(phase_counts)) > 1:
        raise InvalidInput(
            f"the window spans definition versions {', '.join(map(str, sorted(set(versions))))}"
            " with different phase counts; rehearse each version's part of it on its own",
            field="trace",
        )


def check(session: Session, request: dict[str, Any]) -> ProtectionGrid:
    """Refuse (422, naming the field) what would make the job fail or mislead."""
    grid = _grid(request["settings"])
    n_phases = _phases(session, request["trace"])
    for j, label in enumerate(request.get("labels") or []):
        field = f"labels[{j}]"
        phase, kind = label["phase"], label["kind"]
        if phase >= n_phases:
            raise InvalidInput(
                f"phase {phase} is beyond the trace's {n_phases} phases", field=f"{field}.phase"
            )
        try:
            FaultLabels([0.0], [0.0], [phase], [kind])
        except ValueError as err:
            raise InvalidInput(str(err).replace("kind[0]", "kind"), field=f"{field}.kind") from err
        able = (
            ["under_voltage"] if phase == RAIL_PHASE else [r for r in RULES if r != "under_voltage"]
        )
        rules = able if kind == ANY_RULE else [kind]
        if not any(np.isfinite(grid.columns[RULE_LEVEL[r]]).any() for r in rules):
            raise InvalidInput(
                f"no combination sets a level for {' or '.join(rules)}, so nothing can detect "
                f"this label (set {' or '.join(RULE_LEVEL[r] for r in rules)})",
                field=f"{field}.kind",
            )
    return grid


def submit(sessions: sessionmaker[Session], runner: JobRunner, request: dict[str, Any]) -> Job:
    """Check a rehearsal request and queue it."""
    with sessions() as session, session.begin():
        check(session, request)
    return runner.submit(KIND, request, cost=grid_size(request["settings"]))


def _trace(session: Session, spec: dict[str, Any]) -> RehearsalTrace:
    if "trace_id" in spec:
        t = traces.load(session, int(spec["trace_id"]))
        return RehearsalTrace(t.t_s, t.current_a, t.temp_c, t.vin_v, ~t.isolated)
    rail_service.get(session, spec["rail_id"])
    rows = samples.window(
        session, spec["rail_id"], start_s=spec["since"], end_s=spec["until"],
        limit=MAX_WINDOW_SAMPLES,
    )  # fmt: skip
    # Checked before the job too; samples stored since may change the window.
    _check_window(rows.t_s.size, rows.phase_count.tolist(), rows.version.tolist())
    current = np.nan_to_num(rows.current_a, nan=0.0)  # a phase not reported carries nothing
    isolated = (rows.flags & ISOLATING_FLAGS) != 0
    return RehearsalTrace(rows.t_s, current, rows.temp_c, rows.vin_v, ~isolated)


def _labels(request: dict[str, Any]) -> FaultLabels:
    labels_in = request.get("labels") or []
    return FaultLabels(
        [lb["start_s"] for lb in labels_in], [lb["end_s"] for lb in labels_in],
        np.array([lb["phase"] for lb in labels_in], dtype=np.intp),
        [lb["kind"] for lb in labels_in],
    )  # fmt: skip


def run(
    sessions: sessionmaker[Session], request: dict[str, Any], progress: Progress
) -> dict[str, Any]:
    """The job handler: every combination's trips, false trips, latencies and misses, the
    Pareto front of false trips against the worst latency (a miss counted as infinitely
    late) with tied rows grouped, and for a single combination the list of trips."""
    with sessions() as session, session.begin():
        trace = hold_readings(_trace(session, request["trace"]), hold_s(request.get("missing")))
    axes = {k: v for k, v in request["settings"].items() if v is not None}
    grid = ProtectionGrid.product(axes)
    labels = _labels(request)
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
    front = pareto_front(false_trips, max_latency).tolist()
    groups: dict[tuple[int, float], list[int]] = {}
    for c in front:
        key = (int(false_trips[c]), float(np.nan_to_num(max_latency[c], nan=np.inf)))
        groups.setdefault(key, []).append(c)
    result: dict[str, Any] = {
        "combinations": grid.size,
        "axes": names,
        "labels": len(labels.kind),
        "missing": _missing(request),
        "rows": rows,
        "pareto": front,
        "pareto_groups": [
            {
                "false_trips": f,
                "worst_latency_s": _finite(w),
                "rows": members,
            }
            for (f, w), members in groups.items()
        ],
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


def _missing(request: dict[str, Any]) -> dict[str, Any]:
    """The missing-reading policy applied, as a request states it (hold_s None: for ever)."""
    held = hold_s(request.get("missing"))
    return {"policy": "hold" if held > 0 else "clear", "hold_s": held}


def export(session: Session, rehearsal_id: int, index: int) -> dict[str, Any]:
    """Row ``index`` of a finished rehearsal as settings for firmware: every setting (None
    where a rule or blanking is off, or a rule has no hysteresis), the missing-reading policy,
    what was rehearsed and what the row scored. Posting ``settings``, ``missing``, the same
    trace and labels as a new rehearsal gives the same row."""
    job = jobs.get(session, rehearsal_id)
    if job is None or job.kind != KIND:
        raise NotFound(f"no rehearsal {rehearsal_id}", field="rehearsal_id")
    if job.status != "done" or job.result is None:
        raise Conflict(f"rehearsal {rehearsal_id} is {job.status}", field="rehearsal_id")
    result, request = job.result, job.request
    if not 0 <= index < len(result["rows"]):
        raise InvalidInput(f"row {index} is not in 0..{len(result['rows']) - 1}", field="row")
    row = result["rows"][index]
    chosen = ProtectionGrid({k: v for k, v in row["settings"].items()}).settings(0)
    settings = {k: _finite(v) for k, v in vars(chosen).items()}
    spec = request["trace"]
    if "trace_id" in spec:
        stored = traces.load(session, int(spec["trace_id"]))
        source = {"trace_id": spec["trace_id"], "name": stored.name, "rail_id": None}
    else:
        source = {"trace_id": None, "name": None, **spec}
    return {
        "rehearsal_id": rehearsal_id,
        "row": index,
        "exported": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "trace": source,
        "labels": request.get("labels") or [],
        "missing": _missing(request),
        "settings": settings,
        "figures": {
            k: row[k]
            for k in (
                "trips",
                "trips_by_rule",
                "false_trips",
                "missed",
                "mean_latency_s",
                "max_latency_s",
            )
        },
    }
