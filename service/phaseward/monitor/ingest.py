"""Ingest: store a batch of samples, advance the live state, derive events, in one transaction.

A batch is atomic: every sample is stored, or (on any error) none is and the client gets one
4xx naming the first bad field; a rejected batch counts into a ``telemetry.rejected`` episode
(:mod:`rejections`).
Resends are absorbed: a sample whose (rail, seq) is stored already with the same content counts
as a duplicate; the same seq with other content is a conflict. Samples older than the live
state are stored but do not roll it back. The requests of a group commit are stored and judged
as one batch; a sample two of them carry is stored and judged once.

Events and the live state are a pure function of the sample sequence, however it was cut into
requests. Everything carried from one batch to the next (debounce tails, hysteresis latches,
sharing weights, the Kalman estimate, the drift test's statistics and windows, the last
verdict) is the state the same recurrence would hold after that sample, and where the rail is
assessed depends on the samples alone:

* phase conditions are judged at every sample against the one before it (the previous
  batch's last sample for a batch's first);
* the estimator propagates each interval on its own, its length rounded to a 0.5 % geometric
  grid (``_step_runs``), held at the loss and ambient of the sample that starts it;
* the rail (capacity, N-1 screening, forecast, condition) is assessed at the rail's first
  sample; at every sample whose phase conditions differ from the sample before; at the first
  sample in each ``Tolerances.grid_s`` cell of absolute time; and at every sample where what a
  verdict depends on moved beyond its tolerance since the last assessment (load and each phase
  current, each junction estimate, ambient, output voltage, each sharing weight; see
  ``_signature``: 2 % of the rail's total rated current, 1 K, 2 % of nominal output voltage,
  0.02 of an equal share; the reference is carried in the live state as ``assessed``). Each
  verdict is compared with the one before it for the rail events. The live state's verdict
  is the last assessment's (at most one grid cell, or one tolerance, behind the newest
  sample; the live state records which sample it was taken at). A recompute driven by
  tolerances alone, off the per-sample path, keeps this rule: it needs only the carried
  reference.
* an isolation's fault class is decided from a fixed window of stored samples around it,
  once the window is complete (``fault_class``), whichever request completes it.

Routine samples may wait (``Tuning.judge_within_s``): stored and answered, but judged in one
pass with the rail's next ones, once the first of them has waited that long, by the server's
settling loop, a few rails at a time between the groups of requests: a fleet's rails fall due
together (their windows start with the same second's samples), and judging them in the
requests that arrive then held every request of that second behind a burst of passes. When
the loop falls behind, a rail's samples wait at most ``OVERDUE`` times the setting; past that
its next request judges them. That is batching, so events and the live state are the same.
The samples waiting are those stored after the live state (the state row is not written):
held in memory by the process that stored them, read back from the store by any other.

Because of that purity the estimator's covariance (most of the state's size) need not be
written with every sample: the state row leaves it out and lists the samples judged since the
last checkpoint; a process without the state in memory replays them over the checkpoint
(:func:`_restore`) and reaches the state the uninterrupted passes did.
"""

from __future__ import annotations

import secrets
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from itertools import pairwise
from typing import Any

import numpy as np
import numpy.typing as npt
from sqlalchemy import Row
from sqlalchemy.orm import Session, sessionmaker

from phaseward.errors import Conflict, InvalidInput, NotFound, PhasewardError
from phaseward.monitor import drift_watch, fault_class, rail_model
from phaseward.monitor.assess import Assessment, assess, hottest_margin
from phaseward.monitor.conditions import (
    ACTIVE,
    ISOLATED,
    MISSING,
    PHASE_CONDITIONS,
    READINGS,
    Finding,
    Judgement,
    Passed,
    Watch,
    judge,
)
from phaseward.monitor.rail_model import RailModel, phase_power
from phaseward.monitor.rejections import record_rejection
from phaseward.monitor.resident import Ahead, LiveStates, Resident, Waiting, WaitingPart
from phaseward.monitor.telemetry import (
    IncomingSamples,
    SampleBatch,
    concat,
    in_time_order,
    to_batch,
)
from phaseward.physics.drift import InnovationScale
from phaseward.physics.estimator import (
    EstimatorState,
    filter_for,
    filter_run,
    initial_from_readings,
)
from phaseward.physics.plausibility import RULES
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
    waiting: int = 0  # the rail's samples stored and not judged yet, these included


@dataclass(frozen=True)
class _Outcome:
    """Per sample of a (merged) batch: newly stored, and newer than the live state."""

    fresh: npt.NDArray[np.bool_]
    newer: npt.NDArray[np.bool_]
    condition: str | None
    version: int
    rail_id: str = ""
    resident: Resident | None = None  # the live state this pass wrote

    def publish(self, tuning: Tuning) -> None:
        """Keep the written state in memory: only once its transaction has committed."""
        if tuning.live is not None and self.resident is not None:
            tuning.live.put(self.rail_id, self.resident)
        if tuning.waiting is not None and self.rail_id:  # in the writer's order of passes
            since = None if self.resident is None else self.resident.waiting_since
            if since is None:  # judged, or judged elsewhere: nothing of it waits here
                tuning.waiting.clear(self.rail_id)
            else:
                tuning.waiting.mark(self.rail_id, since)

    def split(self, sizes: Sequence[int]) -> list[IngestResult]:
        cuts = np.cumsum(sizes)[:-1]
        parts = zip(np.split(self.fresh, cuts), np.split(self.newer, cuts), strict=True)
        return [self._result(fresh, newer) for fresh, newer in parts]

    def _result(self, fresh: npt.NDArray[np.bool_], newer: npt.NDArray[np.bool_]) -> IngestResult:
        stored = int(fresh.sum())
        return IngestResult(
            stored=stored, duplicates=int((~fresh).sum()), late=stored - int(newer.sum()),
            condition=self.condition, version=self.version,
            waiting=self.resident.waiting_n if self.resident is not None else 0,
        )  # fmt: skip


@dataclass(frozen=True)
class Tolerances:
    """Where the rail is assessed (module docstring): a time grid, and tolerances on what moves
    a verdict between the points where phase conditions change (common practice: well inside
    the margins the verdicts are drawn with, and above sensor noise). Settings
    ``PHASEWARD_ASSESS_*``; tests/service/test_assessment_tolerances.py bounds what they allow
    against assessing every sample."""

    grid_s: float = 10.0  # s, absolute time: one assessment at least in every grid cell
    load: float = 0.02  # of the rail's total rated current, on the load and each phase current
    temp_k: float = 1.0  # K, on each junction estimate and on ambient
    vout: float = 0.02  # of nominal output voltage
    weight: float = 0.02  # on each sharing weight (1.0 = an equal share)


TOLERANCES = Tolerances()


# The monitor pass: the model, the samples, the previous live state and the tolerances in; the
# new live state and the findings out (:func:`advance`).
MonitorPass = Callable[[RailModel, SampleBatch, dict[str, Any], Tolerances], Passed]


@dataclass(frozen=True)
class Tuning:
    """How the monitor runs, from the settings: where it assesses (``tolerances``), how often
    it checkpoints the whole live state (every ``checkpoint_samples`` judged samples; between
    checkpoints the state row is written without the estimator's covariance), the live
    states it keeps in memory (``live``; None: every pass reads the state from the store),
    and how long routine samples may wait to be judged with a rail's next ones
    (``judge_within_s``, 0: never; ``waiting`` lists the rails that have some, on the clock
    ``monotonic``; module docstring; ``ahead`` holds their passes run before the write,
    :func:`judge_ahead`). ``monitor_pass``: what runs the monitor pass in place of
    :func:`advance` (:mod:`judge_apart`); None: :func:`advance`, in this thread."""

    tolerances: Tolerances = TOLERANCES
    checkpoint_samples: int = 60
    live: LiveStates | None = None
    judge_within_s: float = 0.0
    waiting: Waiting | None = None
    monotonic: Callable[[], float] = time.monotonic
    ahead: Ahead | None = None
    monitor_pass: MonitorPass | None = None

    def run_pass(self, model: RailModel, batch: SampleBatch, previous: dict[str, Any]) -> Passed:
        """The monitor pass over ``batch`` (:func:`advance`, or what stands in for it)."""
        return (self.monitor_pass or advance)(model, batch, previous, self.tolerances)


TUNING = Tuning()


def ingest(
    sessions: sessionmaker[Session],
    rail_id: str,
    incoming: IncomingSamples,
    *,
    tuning: Tuning = TUNING,
) -> IngestResult:
    try:
        with transaction(sessions) as session:
            outcome = _ingest(session, rail_id, incoming, tuning=tuning)
        outcome.publish(tuning)
        return outcome.split([incoming.n])[0]
    except (InvalidInput, Conflict) as err:
        answer = _recorded(sessions, (rail_id, [incoming]), err)
        if answer is err:
            raise
        raise answer from err  # counting it failed


def ingest_together(
    sessions: sessionmaker[Session],
    rail_id: str,
    batches: Sequence[IncomingSamples],
    *,
    tuning: Tuning = TUNING,
) -> list[IngestResult | Exception]:
    """Several requests' batches for one rail in one transaction and one monitor pass (group
    commit). Each batch stays all-or-nothing: if the merged batch fails, for a refusal or for
    anything unexpected, every batch is ingested on its own, so only the bad ones fail and
    each failure is its own (one request's data never fails another request)."""
    if len(batches) > 1:
        try:
            with transaction(sessions) as session:
                outcome = _ingest(session, rail_id, concat(batches), [b.n for b in batches], tuning)
            outcome.publish(tuning)
            return list(outcome.split([b.n for b in batches]))
        except Exception:  # retried one by one below, where each failure is reported
            pass
    results: list[IngestResult | Exception] = []
    for batch in batches:
        try:
            results.append(ingest(sessions, rail_id, batch, tuning=tuning))
        except Exception as err:  # handed to that request alone
            results.append(err)
    return results


RailWork = tuple[str, Sequence[IncomingSamples]]


def ingest_rails(
    sessions: sessionmaker[Session],
    work: Sequence[RailWork],
    *,
    tuning: Tuning = TUNING,
) -> list[list[IngestResult | Exception]]:
    """A group of rails (each: its requests' batches) in one transaction: one durable commit
    for a fleet whose every request is for another rail. Each rail keeps its own monitor
    pass, in a savepoint of its own; a rail whose pass fails is rolled back to its savepoint
    and, after the commit, ingested on its own (:func:`ingest_together`), so one rail's bad
    request fails only itself; a refusal of a rail's lone request is its answer at once
    (counted into the rail's rejection episode after the commit), not worked again. If the
    transaction fails as a whole (the commit, a lost connection), every rail is ingested on
    its own. Rails are locked in id order, so two
    processes merging overlapping fleets on PostgreSQL never wait on each other in a cycle.
    A rail whose samples only wait (:func:`_only_waits`) needs no pass and no savepoint: its
    rows join one insert for all such rails of the group; a lone request's too (a fleet that
    is not saturated has most requests go alone)."""
    results: list[list[IngestResult | Exception] | None] = [None] * len(work)
    refused: dict[int, PhasewardError] = {}  # lone requests refused: answered as they are
    if work:
        try:
            done: dict[int, _Outcome] = {}
            with transaction(sessions) as session:
                order = sorted(range(len(work)), key=lambda k: work[k][0])
                locks = _lock(session, [work[k][0] for k in order])
                waiting_rows: list[dict[str, Any]] = []  # of the rails whose samples only wait
                for k in order:
                    rail_id, batches = work[k]
                    sizes = [b.n for b in batches]
                    try:
                        incoming = concat(batches)
                        waits = _only_waits(rail_id, incoming, locks[rail_id], tuning)
                        if waits is None or isinstance(waits, SampleBatch):
                            with session.begin_nested():
                                outcome = _ingest(
                                    session, rail_id, incoming, sizes, tuning, locks[rail_id], waits
                                )
                        else:
                            outcome, rows = waits
                            waiting_rows += rows
                    except (InvalidInput, Conflict, NotFound) as err:
                        # A refusal is decided by the request and the rail's locked rows alone:
                        # a lone request's is its answer (a group's is retried alone below, to
                        # find whose it is).
                        if len(batches) == 1:
                            refused[k] = err
                        continue
                    except Exception:  # retried alone below, where each failure is reported
                        continue
                    done[k] = outcome
                samples.insert_rows(session, waiting_rows)  # one insert for all of them
            for k, outcome in done.items():
                outcome.publish(tuning)
                results[k] = list(outcome.split([b.n for b in work[k][1]]))
        except Exception:  # nothing of this transaction was stored: all retried alone
            refused.clear()
    for k, refusal in refused.items():
        results[k] = [_recorded(sessions, work[k], refusal)]
    return [
        outcomes if outcomes is not None else ingest_together(sessions, *work[k], tuning=tuning)
        for k, outcomes in enumerate(results)
    ]


def _recorded(sessions: sessionmaker[Session], work: RailWork, err: PhasewardError) -> Exception:
    """``err``, a lone request's refusal, once counted into its rail's rejection episode; if
    that fails, the failure."""
    if isinstance(err, NotFound):  # no rail to count it for
        return err
    try:
        record_rejection(sessions, work[0], samples=work[1][0].n, error=err)
    except Exception as failed:  # handed to that request
        return failed
    return err


Locked = tuple[int | None, state.Head | None]  # a rail's version and state head, locked


def _lock(session: Session, rail_ids: Sequence[str]) -> dict[str, Locked]:
    """Lock the rails' rows (in id order, one statement) and then their state rows, and read
    what ingest needs of both (a version None: no such rail; a head None: no state yet)."""
    versions = rails.versions_for_update(session, rail_ids)
    heads = state.heads(session, rail_ids) if versions else {}
    return {rail_id: (versions.get(rail_id), heads.get(rail_id)) for rail_id in rail_ids}


def _held(rail_id: str, head: state.Head | None, tuning: Tuning) -> Resident | None:
    """The live state held in memory, if it is the one stored: nobody wrote since."""
    held = tuning.live.get(rail_id) if tuning.live is not None else None
    if held is None or head is None or head.stamp != held.stamp:
        return None  # another process wrote since, or nothing is held: read the store
    return held


def _only_waits(
    rail_id: str,
    incoming: IncomingSamples,
    locked: Locked,
    tuning: Tuning,
) -> tuple[_Outcome, list[dict[str, Any]]] | SampleBatch | None:
    """The outcome and the rows to store when all of ``incoming`` simply waits: the rail's
    state is held and current, every sample is new (a seq above any stored, none twice),
    newer than the live state and routine (:func:`_may_wait`). Then nothing need be read,
    judged or written but the rows (the stamp is this process's alone, resident.py), which
    the caller stores with other rails'. Anything else is for :func:`_ingest`, handed the
    samples as a batch if this built one (the held model is the one it would build it with),
    else None."""
    version, head = locked
    held = _held(rail_id, head, tuning)
    if tuning.judge_within_s <= 0 or held is None or held.version != version or not incoming.n:
        return None
    seqs = incoming.seq
    if int(seqs.min()) <= held.seq_ceiling or np.unique(seqs).size != seqs.size:
        return None
    batch = to_batch(incoming, held.model)
    if head is not None and head.last_t_s is not None and not (batch.t_s > head.last_t_s).all():
        return batch
    arrived = batch.take(np.argsort(batch.t_s, kind="stable"))
    now = tuning.monotonic()
    if not _may_wait(tuning, held.model, held, arrived, held.waiting_n + arrived.n, now):
        return batch
    kept = _left_waiting(held, int(seqs.max()), arrived, now)
    every = np.ones(batch.n, dtype=bool)
    condition = held.state.get("rail", {}).get("condition")
    outcome = _Outcome(every, every, condition, version, rail_id=rail_id, resident=kept)
    return outcome, _rows(rail_id, version, batch)


def _ingest(
    session: Session,
    rail_id: str,
    incoming: IncomingSamples,
    parts: Sequence[int] = (),
    tuning: Tuning = TUNING,
    locked: Locked | None = None,
    built: SampleBatch | None = None,
) -> _Outcome:
    """Store and judge ``incoming``: one request, or the requests of a group (``parts``: their
    sizes). A sample two requests of a group both carry (a resend racing its original) is
    stored once and judged once, as if the requests had come one after the other.
    ``locked``: what :func:`_lock` found for the rail, if the caller locked it already;
    ``built``: ``incoming`` as a batch of the held model, if the caller built it."""
    now_s = time.time()
    version, head = locked if locked is not None else _lock(session, [rail_id])[rail_id]
    if version is None:
        raise NotFound(f"no rail '{rail_id}'", field="rail_id")
    held = _held(rail_id, head, tuning)
    if held is not None and held.version == version:
        spec, model = held.spec, held.model
    else:
        spec = rails.spec(session, rail_id, version)
        model = rail_model.build(rail_id, version, spec)
    for part in np.split(incoming.seq, np.cumsum(parts or [incoming.n])[:-1]):
        _check_unique_seq(part)
    batch = built if built is not None else to_batch(incoming, model)
    rows = _rows(rail_id, version, batch)

    seqs = [int(s) for s in batch.seq]
    ceiling = held.seq_ceiling if held is not None else samples.highest_seq(session, rail_id)
    # A rail's seqs mostly rise: above the highest stored, no sample can be a resend.
    above = not seqs or min(seqs) > ceiling
    stored_before = {} if above else samples.existing(session, rail_id, seqs)
    ceiling = max([ceiling, *seqs])
    fresh = np.ones(batch.n, dtype=bool)
    first: dict[int, dict[str, Any]] = {}
    for k, row in enumerate(rows):
        old = stored_before.get(row["seq"])
        earlier = first.setdefault(row["seq"], row)
        if earlier is not row:  # an earlier request of the group carries it
            if any(earlier[key] != row[key] for key in _CONTENT):
                raise Conflict(
                    f"sequence number {row['seq']} is sent twice with other content",
                    field=f"[{k}].seq",
                )
            fresh[k] = False
            continue
        if old is None:
            continue
        if any(getattr(old, key) != row[key] for key in _CONTENT):
            raise Conflict(
                f"sequence number {row['seq']} is stored already with other content",
                field=f"[{k}].seq",
            )
        fresh[k] = False
    samples.insert_rows(session, [r for r, f in zip(rows, fresh, strict=True) if f])

    last_t = head.last_t_s if head is not None else None
    newer = fresh & (batch.t_s > (last_t if last_t is not None else -np.inf))
    order = np.argsort(batch.t_s[newer], kind="stable")
    arrived = batch.take(np.nonzero(newer)[0][order])
    stored, replay_stored = _stored_state(session, rail_id, head, held)
    condition = stored.get("rail", {}).get("condition") if stored is not None else None
    outcome = _Outcome(fresh=fresh, newer=newer, condition=condition, version=version)
    # A new definition keeps time order but restarts judgement from a fresh state.
    same = stored is not None and head is not None and head.version == version
    # Only a setting that lets samples wait, or a rail marked at start (a stop left some),
    # can have any: else the look-up in the store is skipped.
    may_have = tuning.judge_within_s > 0 or (
        tuning.waiting is not None and rail_id in tuning.waiting
    )
    waiting = _waiting(session, model, head, held, batch.seq[fresh]) if same and may_have else None
    live_batch = arrived if waiting is None else in_time_order(waiting, arrived)
    if not live_batch.n:  # nothing waits: the samples are resends or late
        if not fresh.any() or head is None:
            return replace(outcome, rail_id=rail_id)
        if held is not None:  # the stamp is ours alone (resident.py): it stays
            return replace(outcome, rail_id=rail_id, resident=replace(held, seq_ceiling=ceiling))
        # Late samples stored: a copy held elsewhere must not vouch for the stored seqs.
        state.restamp(session, rail_id, secrets.randbits(63))
        return replace(outcome, rail_id=rail_id)
    now = tuning.monotonic()
    if held is not None and same and _may_wait(tuning, model, held, arrived, live_batch.n, now):
        kept = _left_waiting(held, ceiling, arrived, now)
        return replace(outcome, rail_id=rail_id, resident=kept)
    if held is not None and same:
        previous = held.state
    elif same and stored is not None and head is not None:
        previous = _restore(session, model, stored, replay_stored, tuning.tolerances)
    else:
        previous = {}
    passed = None
    later: tuple[WaitingPart, ...] = ()  # waiting parts a pass run ahead did not judge
    if tuning.ahead is not None and held is not None and same and not arrived.n:
        ahead = tuning.ahead.take(rail_id, held)  # the waiting samples alone: judged already?
        if ahead is not None:
            judged, passed = ahead
            later = held.waiting_parts[judged:]
            if later:  # they arrived since: they go on waiting
                live_batch = in_time_order(*(part for _, part in held.waiting_parts[:judged]))
    if passed is None:
        passed = tuning.run_pass(model, live_batch, previous)
    new_state, findings = passed
    events.add_many(session, [_event_row(model, live_batch, f) for f in findings])
    isolations = [
        (float(live_batch.t_s[f.sample]), int(f.phase))
        for f in findings
        if f.kind == "phase.isolated" and f.phase is not None
    ]
    fault_class.settle(session, model, isolations)
    last_seq = int(live_batch.seq[-1])
    replay = (held.replay if held is not None and previous else []) + _replay_entries(live_batch)
    if held is None or not previous or len(replay) >= tuning.checkpoint_samples:
        state.put_checkpoint(
            session, rail_id=rail_id, version=version, seq=last_seq, state=new_state
        )
        replay = []
    stamp = secrets.randbits(63)
    state.put(
        session, rail_id=rail_id, version=version, last_seq=last_seq,
        last_t_s=float(live_batch.t_s[-1]), state=_without_covariance(new_state), now_s=now_s,
        stamp=stamp, replay=replay,
    )  # fmt: skip
    return replace(
        outcome,
        condition=new_state["rail"]["condition"],
        rail_id=rail_id,
        resident=Resident(
            stamp=stamp,
            version=version,
            spec=spec,
            model=model,
            state=new_state,
            replay=replay,
            seq_ceiling=ceiling,
            waiting_parts=later,
        ),
    )


def _left_waiting(held: Resident, ceiling: int, arrived: SampleBatch, now: float) -> Resident:
    """``held`` with ``arrived`` (in time order) stored and left to wait after what waits."""
    return replace(held, seq_ceiling=ceiling, waiting_parts=(*held.waiting_parts, (now, arrived)))


def judge_ahead(rail_ids: Sequence[str], tuning: Tuning) -> None:
    """Run the passes over what these rails have waiting now, outside the writer, for the
    write that judges them to take (:class:`~phaseward.monitor.resident.Ahead`): the same
    pass on the same held copy, so the same outcome. A rail with nothing waiting in this
    process's memory, or whose pass fails here, is left to the writer (which reports it)."""
    if tuning.ahead is None or tuning.live is None:
        return
    for rail_id in rail_ids:
        held = tuning.live.get(rail_id)
        if held is None or held.waiting is None or not held.waiting.n:
            continue
        try:
            passed = tuning.run_pass(held.model, held.waiting, held.state)
        except Exception:  # the writer runs it again and reports the failure
            continue
        tuning.ahead.put(rail_id, held, passed)


def _stored_state(
    session: Session, rail_id: str, head: state.Head | None, held: Resident | None
) -> tuple[dict[str, Any] | None, list[Any] | None]:
    """The live state as stored (without its covariance unless held in memory) and what was
    judged since its checkpoint (``replay``)."""
    if held is not None:
        return held.state, held.replay
    if head is None:
        return None, None
    row = state.get(session, rail_id)
    return (None, None) if row is None else (row.state, row.replay)


def _waiting(
    session: Session,
    model: RailModel,
    head: state.Head | None,
    held: Resident | None,
    arrived_seqs: npt.NDArray[np.int64],
) -> SampleBatch | None:
    """The rail's samples stored and not yet judged (newer than the live state): held in
    memory, or else read from the store (written by another process, or before a restart),
    this request's own left out. A current the store has from a sense voltage is judged as
    reported there (the one thing judged that a stored sample does not record)."""
    if held is not None:
        return held.waiting
    if head is None or head.last_t_s is None:
        return None
    found = samples.newer_than(session, model.rail_id, t_s=head.last_t_s, version=model.version)
    own = set(arrived_seqs.tolist())
    rows = [r for r in found if r.seq not in own]
    return _stored_batch(model, rows, [[r.seq] for r in rows]) if rows else None


_MAX_WAITING = 600  # samples of one rail held back at most (memory; a pass judges them all)
# Past this many times ``judge_within_s`` a rail's next request judges its waiting samples
# itself: the backstop for a settling loop that has fallen behind (module docstring).
OVERDUE = 2.0


def _may_wait(
    tuning: Tuning,
    model: RailModel,
    held: Resident,
    arrived: SampleBatch,
    waiting_n: int,
    now: float,
) -> bool:
    """Whether the samples that arrived may wait to be judged with the rail's next ones: only
    when waiting is allowed and the rail's first waiting sample is younger than ``OVERDUE``
    times ``judge_within_s`` (the settling loop judges them once due), and only routine
    samples of a rail in routine state (every phase active, the rail nominal, every phase
    reported with a finite current and temperature, no flag, current within rating,
    temperature below the warning line by the hysteresis, output voltage within its excursion
    band). Anything else is judged at once, with the samples that waited before it."""
    if tuning.judge_within_s <= 0 or not arrived.n or waiting_n > _MAX_WAITING:
        return False
    since = held.waiting_since
    if since is not None and now - since >= OVERDUE * tuning.judge_within_s:
        return False
    live = held.state
    if live.get("rail", {}).get("condition") != "nominal":
        return False
    if any(p["condition"] != PHASE_CONDITIONS[ACTIVE] for p in live["phases"]):
        return False
    rules = model.rules
    band = rules.excursion_fraction * model.vout_v
    return bool(
        arrived.present.all()
        and not arrived.flags.any()
        and np.isfinite(arrived.current_a).all()
        and np.isfinite(arrived.temp_c).all()
        and (np.abs(arrived.current_a) <= model.rated_current_a).all()
        and (arrived.temp_c < model.temp_limit_c - rules.hysteresis_k).all()
        and (np.abs(arrived.vout_v - model.vout_v) <= band).all()
    )


def _without_covariance(full: dict[str, Any]) -> dict[str, Any]:
    estimate = {k: v for k, v in full["estimate"].items() if k != "cov_k2"}
    return full | {"estimate": estimate}


def _replay_entries(batch: SampleBatch) -> list[Any]:
    """Per judged sample: [seq], or [seq, phases] where some current came from a sense
    voltage (the one thing judged that the stored sample does not say)."""
    return [
        [int(seq)] if not sensed.any() else [int(seq), np.flatnonzero(sensed).tolist()]
        for seq, sensed in zip(batch.seq, batch.sensed, strict=True)
    ]


def _restore(
    session: Session,
    model: RailModel,
    stored: dict[str, Any],
    replay: list[Any] | None,
    tolerances: Tolerances,
) -> dict[str, Any]:
    """The whole live state from the row: its covariance is the checkpoint's, carried forward
    over the samples judged since (stored in order in ``replay``) by the same recurrence. The
    samples are stored exactly as they were judged; events are a pure function of them, so the
    replay ends in the state the uninterrupted passes reached (to rounding)."""
    if "cov_k2" in stored.get("estimate", {}) or replay is None:
        return stored  # written whole (before checkpoints existed)
    checkpoint = state.checkpoint(session, model.rail_id)
    if checkpoint is None or checkpoint.version != model.version:
        raise RuntimeError(f"rail '{model.rail_id}' has no checkpoint of version {model.version}")
    covariance = checkpoint.state["estimate"]["cov_k2"]
    found = samples.existing(session, model.rail_id, [int(e[0]) for e in replay])
    # Retention may have reduced the samples of a rail idle since (they are older than its
    # raw horizon): the covariance then resumes from the checkpoint's, the filter's own
    # uncertainty of some samples before, which the next readings correct.
    if replay and len(found) == len(replay):
        batch = _stored_batch(model, [found[int(e[0])] for e in replay], replay)
        replayed, _ = advance(model, batch, checkpoint.state, tolerances)
        covariance = replayed["estimate"]["cov_k2"]
    return stored | {"estimate": stored["estimate"] | {"cov_k2": covariance}}


def _stored_batch(model: RailModel, rows: Sequence[Row[Any]], replay: list[Any]) -> SampleBatch:
    """Stored samples as the batch they were judged as (rows as :func:`_rows` wrote them: a
    phase was reported where its current is a number)."""

    def col(name: str) -> F64:
        values = [getattr(r, name) for r in rows]
        return np.array([np.nan if v is None else v for v in values], dtype=np.float64)

    current = np.stack([np.frombuffer(r.current_a, dtype="<f8") for r in rows])
    sensed = np.zeros(current.shape, dtype=bool)
    for k, entry in enumerate(replay):
        if len(entry) > 1:
            sensed[k, entry[1]] = True
    return SampleBatch(
        seq=np.array([r.seq for r in rows], dtype=np.int64),
        t_s=col("t_s"), vin_v=col("vin_v"), vout_v=col("vout_v"), iout_a=col("iout_a"),
        iin_a=col("iin_a"), ambient_c=col("ambient_c"), present=np.isfinite(current),
        current_a=current.astype(np.float64),
        temp_c=np.stack([np.frombuffer(r.temp_c, dtype="<f8") for r in rows]).astype(np.float64),
        flags=np.stack([np.frombuffer(r.flags, dtype=np.uint8) for r in rows]).astype(np.uint8),
        sensed=sensed,
    )  # fmt: skip


_CONTENT = (
    "t_s", "vin_v", "vout_v", "iout_a", "iin_a", "ambient_c", "current_a", "temp_c", "flags",
)  # fmt: skip


def _check_unique_seq(seqs: npt.NDArray[np.int64]) -> None:
    _, first, counts = np.unique(seqs, return_index=True, return_counts=True)
    if (counts > 1).any():
        seq = int(seqs[first[counts > 1][0]])
        second = int(np.nonzero(seqs == seq)[0][1])
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
            "iin_a": opt(batch.iin_a[k]),
            "ambient_c": opt(batch.ambient_c[k]),
            "current_a": samples.pack(batch.current_a[k], "<f8"),
            "temp_c": samples.pack(batch.temp_c[k], "<f8"),
            "flags": samples.pack(batch.flags[k], "u1"),
        }
        for k in range(batch.n)
    ]


def advance(
    model: RailModel,
    batch: SampleBatch,
    previous: dict[str, Any],
    tolerances: Tolerances = TOLERANCES,
) -> Passed:
    """The live state after ``batch`` (in time order, newer than ``previous``) and its findings.

    The rail is assessed at the points :func:`_assessment_points` picks, each judged against
    the verdict of the point before it (carried in the live state across batches).
    """
    watch = Watch.load(previous["watch"], model) if "watch" in previous else Watch.fresh(model)
    judgement = judge(model, batch, watch)
    received, batch = batch, judgement.clean  # judged without its implausible readings
    ambient = np.where(np.isfinite(batch.ambient_c), batch.ambient_c, model.ambient_c)
    current = np.where(np.isfinite(batch.current_a), batch.current_a, 0.0)
    nodes, junction_std, estimate, drift_in = _estimate(
        model, batch, judgement.codes, current, ambient, previous
    )
    drift_state, drift_found = drift_watch.watch(model, drift_in, batch.t_s, previous)

    prior = previous.get("rail", {})
    signature = _signature(model, judgement, current, nodes[1:], ambient, batch.vout_v, tolerances)
    points, reference = _assessment_points(
        model, batch, judgement.codes, signature, previous if prior else {}, tolerances.grid_s
    )
    findings = list(judgement.findings) + drift_found
    for k in points:
        verdict = assess(
            model, codes=judgement.codes[k], current_a=current[k],
            load_a=float(judgement.load_a[k]), vout_v=float(batch.vout_v[k]),
            weights=judgement.weights[k], nodes_c=nodes[k + 1], ambient_c=float(ambient[k]),
        )  # fmt: skip
        findings += _rail_findings(k, verdict, prior)
        prior = verdict.as_dict()
        assessed = {"seq": int(batch.seq[k]), "t_s": float(batch.t_s[k])}
    if not points:
        assessed = previous["assessed"]
    findings.sort(key=lambda f: f.sample)
    last = batch.n - 1
    active_now = judgement.codes[last] == ACTIVE
    new_state = {
        "watch": judgement.watch.__dict__,
        "rail": prior | {"margin_to_limit_k": hottest_margin(model, nodes[-1], active_now)[1]},
        "assessed": assessed | {"signature": reference.tolist()},
        "nodes_c": nodes[-1].tolist(),
        "junction_std_k": junction_std[-1].tolist(),
        "estimate": {"mean_c": estimate.mean_c.tolist(), "cov_k2": estimate.cov_k2.tolist()},
        "drift": drift_state,
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
                "temp_c": _opt(judgement.held_temp_c[last, i]),
                "flags": int(batch.flags[last, i]),
            }
            | telemetry_view(judgement, received, last, i)
            for i in range(model.n_phases)
        ],
        "load_assumed_a": float(np.nansum(judgement.assumed_a[last]))
        if np.isfinite(judgement.assumed_a[last]).any()
        else None,
    }
    return new_state, findings


_LOOKAHEAD = 64  # samples scanned at a time for the next drift beyond tolerance


def _signature(
    model: RailModel,
    judgement: Judgement,
    current: F64,
    nodes: F64,
    ambient: F64,
    vout: F64,
    tol: Tolerances,
) -> F64:
    """What a verdict depends on at each sample, in units of its tolerance. (n, m)."""
    amps = tol.load * float(model.rated_current_a.sum())
    return np.column_stack(
        [
            judgement.load_a / amps,
            current / amps,
            nodes[:, model.network.junction_node] / tol.temp_k,
            ambient / tol.temp_k,
            vout / (tol.vout * model.vout_v),
            judgement.weights / tol.weight,
        ]
    )


def _assessment_points(
    model: RailModel,
    batch: SampleBatch,
    codes: npt.NDArray[np.int8],
    signature: F64,
    previous: dict[str, Any],
    grid_s: float,
) -> tuple[list[int], F64]:
    """Samples of the batch at which the rail is assessed, and the signature of the last one.

    ``previous``: the live state before the batch, or {} when the rail has no verdict yet.
    """
    known = bool(previous) and "assessed" in previous
    codes_before = np.asarray(previous["watch"]["codes"]) if known else codes[0]
    t_before = float(previous["sample"]["t_s"]) if known else batch.t_s[0]
    cell = np.floor(batch.t_s / grid_s)
    forced = np.any(codes != np.concatenate([codes_before[None, :], codes[:-1]]), axis=1)
    forced |= cell != np.concatenate([[np.floor(t_before / grid_s)], cell[:-1]])
    if known:
        reference = np.asarray(previous["assessed"]["signature"], dtype=np.float64)
    else:
        forced[0] = True  # a rail's first verdict belongs to its first sample
        reference = signature[0]
    forced_at = np.flatnonzero(forced)
    points: list[int] = []
    start = 0
    while start < batch.n:  # one turn per point (or per look-ahead window), not per sample
        j = int(np.searchsorted(forced_at, start))
        stop = int(forced_at[j]) if j < forced_at.size else batch.n
        end = min(stop, start + _LOOKAHEAD)
        drift = np.any(np.abs(signature[start:end] - reference) > 1.0, axis=1)
        if drift.any():
            k = start + int(np.argmax(drift))
        elif end == stop and stop < batch.n:
            k = stop
        else:
            start = end
            continue
        points.append(k)
        reference = signature[k]
        start = k + 1
    return points, reference


def telemetry_view(judgement: Judgement, received: SampleBatch, k: int, i: int) -> dict[str, Any]:
    """What phase ``i``'s figures at sample ``k`` rest on: ``reading`` fresh, held (the last
    good one, ``reading_age_s`` old) or missing; ``assumed_a`` the current the load assumed
    for it; ``implausible`` the rule its received reading broke, with the value received."""
    rules = judgement.rules
    rule = int(rules.current[k, i]) or int(rules.temp[k, i])
    reading = int(judgement.reading[k, i])
    return {
        "reading": READINGS[reading],
        "reading_age_s": None
        if reading == MISSING
        else float(received.t_s[k] - judgement.reading_t_s[i]),
        "assumed_a": _opt(judgement.assumed_a[k, i]),
        "implausible": None
        if not rule
        else {
            "rule": RULES[rule],
            "current_a": _opt(received.current_a[k, i]),
            "temp_c": _opt(received.temp_c[k, i]),
        },
    }


def _opt(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None


def _estimate(
    model: RailModel,
    batch: SampleBatch,
    codes: npt.NDArray[np.int8],
    current: F64,
    ambient: F64,
    previous: dict[str, Any],
) -> tuple[F64, F64, EstimatorState, drift_watch.DriftInput]:
    """Kalman estimate of every node at the previous sample and at each sample of the batch:
    node means (n + 1, n_nodes), junction std (n + 1, n_phases), the final estimate, and what
    the drift test takes of each sample (normalised innovations, NaN where none; the scale of
    the step it was filtered at; the loss held over the interval).

    The network is driven by the measured currents through the loss model, each held until
    the next sample with the ambient of the sample that starts the interval, and corrected by
    the temperature readings (an implausible one never reaches here). Without a previous
    estimate the filter starts from the first sample's readings and ambient
    (:func:`~phaseward.physics.estimator.initial_from_readings`).
    """
    rules = model.rules
    powered = codes != ISOLATED  # a suspect or silent phase may still carry its current
    readings = batch.temp_c  # the gate has left out every implausible one
    estimate: EstimatorState | None = None  # the previous one is rebuilt only if it is kept
    if "estimate" in previous:
        mean = np.asarray(previous["estimate"]["mean_c"], dtype=np.float64)
        cov = np.asarray(previous["estimate"]["cov_k2"], dtype=np.float64)
        last = previous["phases"]
        # The previous sample's losses with the batch's, in one evaluation: row 0.
        p0, slope = phase_power(
            model,
            np.vstack([[p["current_a"] or 0.0 for p in last], current]),
            np.vstack([[p["condition"] != "isolated" for p in last], powered]),
        )
        t_prev = float(previous["sample"]["t_s"])
        ambient_prev = float(previous["sample"]["ambient_c"])
    else:
        p0, slope = phase_power(model, current, powered)
        try:
            steady = steady_state_c(model.network, p0[0], slope[0], float(ambient[0]))
        except ThermalRunaway:
            steady = np.full(model.network.n_nodes, float(ambient[0]))
        estimate = initial_from_readings(
            model.network, float(ambient[0]), steady, readings[0],
            sensor_noise_k=rules.sensor_noise_k, sensor_offset_k=rules.sensor_offset_k,
            sensor_lag=rules.sensor_tau_s is not None,
        )  # fmt: skip
        mean, cov = estimate.mean_c, estimate.cov_k2
        p0, slope = np.vstack([p0[:1], p0]), np.vstack([slope[:1], slope])
        t_prev, ambient_prev = float(batch.t_s[0]), float(ambient[0])
    # Row k of power0, power_slope (p0, slope less the last row) is held over interval k.
    dt = np.diff(np.concatenate([[t_prev], batch.t_s]))
    power0, power_slope = p0[:-1], slope[:-1]
    held_ambient = np.concatenate([[ambient_prev], ambient[:-1]])
    n_nodes = model.network.n_nodes
    junction = model.network.junction_node
    means = [mean]
    stds = [np.sqrt(np.diag(cov))[junction]]
    z = np.full((batch.n, model.n_phases), np.nan)  # normalised innovations (none: NaN)
    scale = np.ones((3, batch.n, model.n_phases))  # InnovationScale of each sample's step
    held_w = np.zeros((batch.n, model.n_phases))  # loss held over each interval
    try:
        for lo, hi, step in _step_runs(dt):
            if step <= 0.0:  # samples at one instant: nothing to propagate
                means.extend([means[-1]] * (hi - lo))
                stds.extend([stds[-1]] * (hi - lo))
                continue
            filt = filter_for(
                model.network, step, process_noise_w=rules.process_noise_w,
                sensor_noise_k=rules.sensor_noise_k, sensor_tau_s=rules.sensor_tau_s,
                sensor_offset_k=rules.sensor_offset_k,
            )  # fmt: skip
            trace = filter_run(
                filt, mean, cov, power0[lo:hi], power_slope[lo:hi], held_ambient[lo:hi],
                readings[lo:hi],
            )  # fmt: skip
            estimate = trace.final
            mean, cov = estimate.mean_c, estimate.cov_k2
            means.extend(trace.means_c[1:])
            stds.extend(trace.junction_std_k[1:])
            held_w[lo:hi] = power0[lo:hi] + power_slope[lo:hi] * trace.means_c[:-1, junction]
            innovation = drift_watch.steady(model, step)
            if innovation is not None:
                z[lo:hi] = trace.innovation_z
                scale[:, lo:hi] = innovation.scale_rows[:, None, :]
    except ThermalRunaway:
        # The losses outgrow the network's conductance: the assessment reports runaway;
        # keep the last finite estimate rather than numbers that mean nothing.
        means.extend([means[-1]] * (batch.n + 1 - len(means)))
        stds.extend([stds[-1]] * (batch.n + 1 - len(stds)))
    drift_in = drift_watch.DriftInput(z, InnovationScale(*scale), held_w)
    if estimate is None:
        estimate = EstimatorState(mean, cov)
    return np.asarray(means)[:, :n_nodes], np.asarray(stds), estimate, drift_in


STEP_GRID = 0.005  # relative: each interval is propagated with its length on this grid


def _step_runs(dt: F64) -> list[tuple[int, int, float]]:
    """Runs of consecutive intervals that share one propagation step: (start, stop, step s).

    The exact propagator is cached per step length, and rack clocks jitter. Each interval's
    length is rounded to a geometric grid 0.5 % wide, (1 + 0.005)^m s: a pure function of the
    interval itself, so the estimate does not depend on which samples share a request, and
    no interval is propagated more than 0.25 % longer or shorter than it lasted. An interval
    of zero (two samples at one instant) gets step 0. This loops per run, not per sample.
    """
    with np.errstate(divide="ignore"):
        grid = np.where(dt > 0.0, np.round(np.log(dt) / np.log1p(STEP_GRID)), -np.inf)
    edges = np.concatenate([[0], np.flatnonzero(np.diff(grid) != 0) + 1, [dt.size]])
    return [
        (int(a), int(b), (1.0 + STEP_GRID) ** int(grid[a]) if np.isfinite(grid[a]) else 0.0)
        for a, b in pairwise(edges)
    ]


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
    out += _security_findings(k, verdict, prior)
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


def _security_findings(k: int, verdict: Assessment, prior: dict[str, Any]) -> list[Finding]:
    """``capacity.exposed`` when the rail, whatever its condition, loses N-1 security (some
    single further phase loss would overload it), cleared when it is regained. A rail's first
    verdict is compared with a secure rail, so a rail that starts insecure says so."""
    was_secure = bool(prior.get("n1_secure", True))
    if verdict.n1_secure == was_secure:
        return []
    if verdict.n1_secure:
        return [
            Finding(
                k, "capacity.exposed", "info", None,
                "N-1 security regained: any single further phase loss is survivable",
                {"cleared": True, "load_a": round(verdict.load_a, 3)},
            )
        ]  # fmt: skip
    weakest = next((row for row in verdict.n1_weakest if row["overloads"]), None)
    details: dict[str, Any] = {
        "cleared": False,
        "load_a": round(verdict.load_a, 3),
        "overloading_losses": verdict.n1_overloading,
        "single_losses": verdict.n1_cases,
        "weakest": weakest,
        "shortfall_a": None,
    }
    if weakest is None:  # no phase left to lose: nothing further can be survived
        message = "N-1 security lost: no active phase left to lose"
    else:
        shortfall = max(0.0, verdict.load_a - weakest["capacity_a"])
        details["shortfall_a"] = round(shortfall, 3)
        lost = ", ".join(str(p) for p in weakest["lose_phases"])
        message = (
            f"N-1 security lost: losing phase {lost} would leave {weakest['capacity_a']:.1f} A "
            f"for {verdict.load_a:.1f} A ({shortfall:.1f} A short)"
            if shortfall > 0
            else f"N-1 security lost: losing phase {lost} would overheat the survivors"
        ) + f"; {verdict.n1_overloading} of {verdict.n1_cases} single losses overload"
    return [Finding(k, "capacity.exposed", "warning", None, message, details)]


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
