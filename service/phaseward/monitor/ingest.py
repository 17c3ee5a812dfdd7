"""Ingest: store a batch of samples, advance the live state, derive events, in one transaction.

A batch is atomic: every sample is stored, or (on any error) none is and the client gets one
4xx naming the first bad field; a rejected batch leaves a ``telemetry.rejected`` event.
Resends are absorbed: a sample whose (rail, seq) is stored already with the same content counts
as a duplicate; the same seq with other content is a conflict. Samples older than the live
state are stored but do not roll it back.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass
from itertools import pairwise
from typing import Any

import numpy as np
import numpy.typing as npt
from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import Conflict, InvalidInput, NotFound, PhasewardError
from phaseward.monitor import fault_class, rail_model
from phaseward.monitor.assess import Assessment, assess, hottest_margin
from phaseward.monitor.conditions import ACTIVE, PHASE_CONDITIONS, SUSPECT, Finding, Watch, judge
from phaseward.monitor.rail_model import RailModel, phase_power
from phaseward.monitor.telemetry import IncomingSamples, SampleBatch, concat, to_batch
from phaseward.physics.estimator import EstimatorState, initial_state, kalman_run
from phaseward.physics.thermal import ThermalRunaway, steady_state_c
from phaseward.store import events, rails, samples, state
from phaseward.store.db import transaction

F64 = npt.NDArray[np.float64]


@dataclass(frozen=True)
class IngestResult:
    stored: int
    duplicates: int
    late: int
    condition: str | None
    version: int


@dataclass(frozen=True)
class _Outcome:
    """Per sample of a (merged) batch: newly stored, and newer than the live state."""

    fresh: npt.NDArray[np.bool_]
    newer: npt.NDArray[np.bool_]
    condition: str | None
    version: int

    def split(self, sizes: Sequence[int]) -> list[IngestResult]:
        cuts = np.cumsum(sizes)[:-1]
        parts = zip(np.split(self.fresh, cuts), np.split(self.newer, cuts), strict=True)
        return [self._result(fresh, newer) for fresh, newer in parts]

    def _result(self, fresh: npt.NDArray[np.bool_], newer: npt.NDArray[np.bool_]) -> IngestResult:
        stored = int(fresh.sum())
        return IngestResult(
            stored=stored, duplicates=int((~fresh).sum()), late=stored - int(newer.sum()),
            condition=self.condition, version=self.version,
        )  # fmt: skip


def ingest(
    sessions: sessionmaker[Session], rail_id: str, incoming: IncomingSamples
) -> IngestResult:
    try:
        with transaction(sessions) as session:
            return _ingest(session, rail_id, incoming).split([incoming.n])[0]
    except (InvalidInput, Conflict) as err:
        record_rejection(sessions, rail_id, samples=incoming.n, error=err)
        raise


def ingest_together(
    sessions: sessionmaker[Session], rail_id: str, batches: Sequence[IncomingSamples]
) -> list[IngestResult | PhasewardError]:
    """Several requests' batches for one rail in one transaction and one monitor pass (group
    commit). Each batch stays all-or-nothing: if the merged batch is refused, every batch is
    ingested on its own, so only the bad ones fail and each failure names its own field."""
    if len(batches) > 1:
        try:
            with transaction(sessions) as session:
                outcome = _ingest(session, rail_id, concat(batches))
            return list(outcome.split([b.n for b in batches]))
        except PhasewardError:
            pass
    results: list[IngestResult | PhasewardError] = []
    for batch in batches:
        try:
            results.append(ingest(sessions, rail_id, batch))
        except PhasewardError as err:
            results.append(err)
    return results


def _ingest(session: Session, rail_id: str, incoming: IncomingSamples) -> _Outcome:
    now_s = time.time()
    rail = rails.get(session, rail_id, for_update=True)
    if rail is None:
        raise NotFound(f"no rail '{rail_id}'", field="rail_id")
    model = rail_model.build(rail.id, rail.version, rails.spec(session, rail.id, rail.version))
    _check_unique_seq(incoming)
    batch = to_batch(incoming, model)
    rows = _rows(rail_id, rail.version, batch)

    stored_before = samples.existing(session, rail_id, [int(s) for s in batch.seq])
    fresh = np.ones(batch.n, dtype=bool)
    for k, row in enumerate(rows):
        old = stored_before.get(row["seq"])
        if old is None:
            continue
        if any(getattr(old, key) != row[key] for key in _CONTENT):
            raise Conflict(
                f"sequence number {row['seq']} is stored already with other content",
                field=f"[{k}].seq",
            )
        fresh[k] = False
    samples.insert_rows(session, [r for r, f in zip(rows, fresh, strict=True) if f])

    live = state.get(session, rail_id, for_update=True)
    last_t = live.last_t_s if live is not None else None
    newer = fresh & (batch.t_s > (last_t if last_t is not None else -np.inf))
    order = np.argsort(batch.t_s[newer], kind="stable")
    live_batch = batch.take(np.nonzero(newer)[0][order])
    condition = live.state.get("rail", {}).get("condition") if live is not None else None
    if live_batch.n:
        # A new definition keeps time order but restarts judgement from a fresh state.
        previous = live.state if live is not None and live.version == rail.version else {}
        new_state, findings = advance(model, live_batch, previous)
        events.add_many(session, [_event_row(model, live_batch, f) for f in findings])
        isolations = [
            (float(live_batch.t_s[f.sample]), int(f.phase))
            for f in findings
            if f.kind == "phase.isolated" and f.phase is not None
        ]
        pending = fault_class.waiting(previous.get("pending_isolations", []), isolations)
        new_state["pending_isolations"] = fault_class.settle(session, model, pending)
        state.put(
            session, rail_id=rail_id, version=rail.version, last_seq=int(live_batch.seq[-1]),
            last_t_s=float(live_batch.t_s[-1]), state=new_state, now_s=now_s,
        )  # fmt: skip
        condition = new_state["rail"]["condition"]
    return _Outcome(fresh=fresh, newer=newer, condition=condition, version=rail.version)


_CONTENT = ("t_s", "vin_v", "vout_v", "iout_a", "ambient_c", "current_a", "temp_c", "flags")


def _check_unique_seq(incoming: IncomingSamples) -> None:
    _, first, counts = np.unique(incoming.seq, return_index=True, return_counts=True)
    if (counts > 1).any():
        seq = int(incoming.seq[first[counts > 1][0]])
        second = int(np.nonzero(incoming.seq == seq)[0][1])
        raise InvalidInput(
            f"sequence number {seq} appears twice in the batch", field=f"[{second}].seq"
        )


def _rows(rail_id: str, version: int, batch: SampleBatch) -> list[dict[str, Any]]:
    def opt(x: float) -> float | None:
        return float(x) if np.isfinite(x) else None

    return [
        {
            "rail_id": rail_id,
            "seq": int(batch.seq[k]),
            "t_s": float(batch.t_s[k]),
            "version": version,
            "vin_v": float(batch.vin_v[k]),
            "vout_v": float(batch.vout_v[k]),
            "iout_a": opt(batch.iout_a[k]),
            "ambient_c": opt(batch.ambient_c[k]),
            "current_a": samples.pack(batch.current_a[k], "<f8"),
            "temp_c": samples.pack(batch.temp_c[k], "<f8"),
            "flags": samples.pack(batch.flags[k], "u1"),
        }
        for k in range(batch.n)
    ]


def advance(
    model: RailModel, batch: SampleBatch, previous: dict[str, Any]
) -> tuple[dict[str, Any], list[Finding]]:
    """The live state after ``batch`` (in time order, newer than ``previous``) and its findings."""
    watch = (
        Watch.load(previous["watch"], model.n_phases)
        if "watch" in previous
        else Watch.fresh(model.n_phases)
    )
    judgement = judge(model, batch, watch)
    ambient = np.where(np.isfinite(batch.ambient_c), batch.ambient_c, model.ambient_c)
    current = np.where(np.isfinite(batch.current_a), batch.current_a, 0.0)
    nodes, junction_std, estimate = _estimate(
        model, batch, judgement.codes, current, ambient, previous
    )

    # Judge the rail where the phase conditions change and at the end of the batch: between
    # those points the verdict moves only with load and temperature, which the newest
    # sample speaks for.
    change = np.any(judgement.codes[1:] != judgement.codes[:-1], axis=1)
    prior = previous.get("rail", {})
    first = [] if prior else [0]  # a rail's first verdict belongs to its first sample
    points = sorted({*first, *(np.nonzero(change)[0] + 1).tolist(), batch.n - 1})
    weights = np.asarray(judgement.watch.weights)
    findings = list(judgement.findings)
    verdict: Assessment | None = None
    for k in points:
        verdict = assess(
            model, codes=judgement.codes[k], current_a=current[k],
            load_a=float(judgement.load_a[k]), vout_v=float(batch.vout_v[k]), weights=weights,
            nodes_c=nodes[k + 1], ambient_c=float(ambient[k]),
        )  # fmt: skip
        findings += _rail_findings(k, verdict, prior)
        prior = verdict.as_dict()
    assert verdict is not None  # points always holds the last sample
    findings.sort(key=lambda f: f.sample)
    last = batch.n - 1
    active_now = judgement.codes[last] == ACTIVE
    new_state = {
        "watch": judgement.watch.__dict__,
        "rail": verdict.as_dict()
        | {"margin_to_limit_k": hottest_margin(model, nodes[-1], active_now)[1]},
        "nodes_c": nodes[-1].tolist(),
        "junction_std_k": junction_std[-1].tolist(),
        "estimate": {"mean_c": estimate.mean_c.tolist(), "cov_k2": estimate.cov_k2.tolist()},
        "sample": {
            "seq": int(batch.seq[last]),
            "t_s": float(batch.t_s[last]),
            "vin_v": float(batch.vin_v[last]),
            "vout_v": float(batch.vout_v[last]),
            "ambient_c": float(ambient[last]),
        },
        "phases": [
            {
                "condition": PHASE_CONDITIONS[int(judgement.codes[last, i])],
                "current_a": _opt(batch.current_a[last, i]),
                "temp_c": _opt(batch.temp_c[last, i]),
                "flags": int(batch.flags[last, i]),
            }
            for i in range(model.n_phases)
        ],
    }
    return new_state, findings


def _opt(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None


def _estimate(
    model: RailModel,
    batch: SampleBatch,
    codes: npt.NDArray[np.int8],
    current: F64,
    ambient: F64,
    previous: dict[str, Any],
) -> tuple[F64, F64, EstimatorState]:
    """Kalman estimate of every node at the previous sample and at each sample of the batch:
    node means (n + 1, n_nodes), junction std (n + 1, n_phases), and the final estimate.

    The network is driven by the measured currents through the loss model, each held until
    the next sample, and corrected by the temperature readings (a suspect phase's reading is
    not trusted). Without a previous estimate the filter starts from the steady state of the
    first sample's losses, with a wide uncertainty.
    """
    rules = model.rules
    lagged = rules.sensor_tau_s is not None
    active = codes == ACTIVE
    p0, slope = phase_power(model, current, active)
    if "estimate" in previous:
        state = EstimatorState(
            mean_c=np.asarray(previous["estimate"]["mean_c"], dtype=np.float64),
            cov_k2=np.asarray(previous["estimate"]["cov_k2"], dtype=np.float64),
        )
        last = previous["phases"]
        q0, qs = phase_power(
            model,
            np.asarray([p["current_a"] or 0.0 for p in last], dtype=np.float64),
            np.asarray([p["condition"] == "active" for p in last]),
        )
        t_prev = float(previous["sample"]["t_s"])
    else:
        try:
            start = steady_state_c(model.network, p0[0], slope[0], float(ambient[0]))
        except ThermalRunaway:
            start = np.full(model.network.n_nodes, float(ambient[0]))
        state = initial_state(model.network, start, std_k=START_STD_K, sensor_lag=lagged)
        q0, qs, t_prev = p0[0], slope[0], float(batch.t_s[0])
    dt = np.diff(np.concatenate([[t_prev], batch.t_s]))
    power0 = np.concatenate([q0[None, :], p0[:-1]])
    power_slope = np.concatenate([qs[None, :], slope[:-1]])
    held_ambient = np.concatenate([ambient[:1], ambient[:-1]])
    readings = np.where(codes == SUSPECT, np.nan, batch.temp_c)
    n_nodes = model.network.n_nodes
    means = [state.mean_c]
    stds = [np.sqrt(np.diag(state.cov_k2))[model.network.junction_node]]
    try:
        for lo, hi in _similar_runs(dt):
            step = float(dt[lo:hi].mean())
            if step <= 0.0:  # samples at one instant: nothing to propagate
                means.extend([means[-1]] * (hi - lo))
                stds.extend([stds[-1]] * (hi - lo))
                continue
            trace = kalman_run(
                model.network, state, step, power0[lo:hi], power_slope[lo:hi],
                held_ambient[lo:hi], readings[lo:hi], process_noise_w=rules.process_noise_w,
                sensor_noise_k=rules.sensor_noise_k, sensor_tau_s=rules.sensor_tau_s,
                sensor_offset_k=rules.sensor_offset_k,
            )  # fmt: skip
            state = trace.final
            means.extend(trace.means_c[1:])
            stds.extend(trace.junction_std_k[1:])
    except ThermalRunaway:
        # The losses outgrow the network's conductance: the assessment reports runaway;
        # keep the last finite estimate rather than numbers that mean nothing.
        means.extend([means[-1]] * (batch.n + 1 - len(means)))
        stds.extend([stds[-1]] * (batch.n + 1 - len(stds)))
    return np.asarray(means)[:, :n_nodes], np.asarray(stds), state


START_STD_K = 5.0  # uncertainty of a first estimate taken from the steady state


SIMILAR_STEP = 0.02  # relative: sample intervals closer than this are propagated as one step


def _similar_runs(dt: F64) -> list[tuple[int, int]]:
    """Split intervals into runs of near-equal length, each propagated with its mean step.

    The exact propagator wants a constant step. Rack clocks jitter by far less than the
    thermal time constants, so intervals are grouped by their length in 2 % wide buckets:
    a run keeps its total duration and no sample moves by more than 2 % of the time elapsed
    in its run. This loops per run, not per sample.
    """
    bucket = np.round(np.log(np.maximum(dt, 1e-9)) / np.log1p(SIMILAR_STEP))
    edges = np.concatenate([[0], np.flatnonzero(np.diff(bucket) != 0) + 1, [dt.size]])
    return [(int(a), int(b)) for a, b in pairwise(edges)]


def _rail_findings(k: int, verdict: Assessment, prior: dict[str, Any]) -> list[Finding]:
    out: list[Finding] = []
    before = prior.get("condition")
    if verdict.condition != before:
        severity = {"nominal": "info", "exposed": "warning", "degraded": "warning"}.get(
            verdict.condition, "critical"
        )
        out.append(
            Finding(
                k, "rail.condition", severity, None,
                f"rail {before or 'new'} -> {verdict.condition}",
                {"from": before, "to": verdict.condition,
                 "capacity_a": round(verdict.capacity_a, 3), "load_a": round(verdict.load_a, 3)},
            )
        )  # fmt: skip
    short = verdict.load_a > verdict.capacity_a
    was_short = prior.get("load_a", 0.0) > prior.get("capacity_a", np.inf)
    if short != was_short:
        out.append(
            Finding(
                k, "capacity.short", "critical" if short else "info", verdict.binding_phase,
                f"load {verdict.load_a:.1f} A exceeds remaining capacity "
                f"{verdict.capacity_a:.1f} A (bound by {verdict.binding.replace('_', ' ')})"
                if short else "load back within remaining capacity",
                {"load_a": round(verdict.load_a, 3), "capacity_a": round(verdict.capacity_a, 3),
                 "cleared": not short},
            )
        )  # fmt: skip
    forecast = verdict.time_to_warning_s is not None or verdict.runaway
    was_forecast = prior.get("time_to_warning_s") is not None or bool(prior.get("runaway"))
    if forecast != was_forecast:
        if verdict.runaway:
            message = "thermal runaway: no steady state at the present load"
        elif forecast:
            message = (
                f"phase {verdict.warning_phase} forecast to reach its warning line in "
                f"{verdict.time_to_warning_s:.0f} s"
            )
        else:
            message = "no warning line forecast within the horizon"
        out.append(
            Finding(
                k, "thermal.forecast", "critical" if forecast else "info", verdict.warning_phase,
                message,
                {"time_to_warning_s": verdict.time_to_warning_s, "runaway": verdict.runaway,
                 "cleared": not forecast},
            )
        )  # fmt: skip
    return out


def _event_row(model: RailModel, batch: SampleBatch, f: Finding) -> dict[str, Any]:
    return {
        "rail_id": model.rail_id,
        "version": model.version,
        "t_s": float(batch.t_s[f.sample]),
        "kind": f.kind,
        "severity": f.severity,
        "phase": f.phase,
        "message": f.message,
        "details": {**f.details, "seq": int(batch.seq[f.sample])},
    }


def record_rejection(
    sessions: sessionmaker[Session], rail_id: str, *, samples: int, error: PhasewardError
) -> None:
    """Leave a trace of a refused batch on a known rail, in its own transaction."""
    with transaction(sessions) as session:
        rail = rails.get(session, rail_id)
        if rail is None:
            return
        row = {
            "rail_id": rail_id,
            "version": rail.version,
            "t_s": time.time(),
            "kind": "telemetry.rejected",
            "severity": "warning",
            "phase": None,
            "message": f"batch of {samples} samples refused: {error.detail}",
            "details": {"field": error.field, "error": error.error, "samples": samples},
        }
        events.add_many(session, [row])
