"""Invented traces and the ways of cutting them into requests, for the cut-invariance tests.

Every trace is data made up for tests: a rail definition and a list of sample bodies in time
order. ``Ingestor`` posts them straight to the monitor (one request, a group-commit merge of
several, or a resend) and reads back what the cut-invariance property compares: the stored
events (kind, phase, time, seq, severity, message, details) and the live state.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker
from tests.drift_sim import simulate
from tests.factories import rail_spec

from phaseward.api.schemas.samples import SAMPLES, to_incoming
from phaseward.monitor.ingest import ingest, ingest_together
from phaseward.monitor.telemetry import IncomingSamples
from phaseward.store import state
from phaseward.store.db import transaction
from phaseward.store.models import Event

Json = dict[str, Any]
T0 = 1.8e9


@dataclass(frozen=True)
class Trace:
    name: str
    spec: Json
    samples: list[Json]


def incoming(items: list[Json]) -> IncomingSamples:
    return to_incoming(SAMPLES.validate_python(items))


class Ingestor:
    """Posts a trace's samples to one rail through the monitor's ingest functions."""

    def __init__(self, sessions: sessionmaker[Session], rail_id: str, trace: Trace) -> None:
        self.sessions, self.rail_id, self.trace = sessions, rail_id, trace

    def post(self, lo: int, hi: int) -> None:
        ingest(self.sessions, self.rail_id, incoming(self.trace.samples[lo:hi]))

    def post_together(self, ranges: list[tuple[int, int]]) -> None:
        batches = [incoming(self.trace.samples[lo:hi]) for lo, hi in ranges]
        for outcome in ingest_together(self.sessions, self.rail_id, batches):
            assert not isinstance(outcome, Exception), outcome

    def events(self) -> list[tuple[Any, ...]]:
        with transaction(self.sessions) as session:
            rows = session.scalars(
                select(Event).where(Event.rail_id == self.rail_id).order_by(Event.id)
            ).all()
            return [
                (e.kind, e.phase, e.t_s, e.details.get("seq"), e.severity, e.message, e.details)
                for e in rows
                if e.kind != "telemetry.rejected"
            ]

    def live(self) -> Json:
        with transaction(self.sessions) as session:
            row = state.get(session, self.rail_id)
            assert row is not None
            return dict(row.state)


def rail_id_for(trace: Trace, tag: str) -> str:
    return f"{trace.name}-{tag}"


def spec_for(trace: Trace, rail_id: str) -> Json:
    return trace.spec | {"id": rail_id}


# ---------------------------------------------------------------- invented traces


def _bodies(
    t: np.ndarray,
    current: np.ndarray,
    temp: np.ndarray,
    *,
    flags: np.ndarray | None = None,
    absent: np.ndarray | None = None,
    ambient: np.ndarray | None = None,
    vin: np.ndarray | None = None,
    vout: np.ndarray | None = None,
) -> list[Json]:
    """Sample bodies from (n,) times and (n, p) currents and temperatures (NaN: no reading)."""
    n, p = current.shape
    out = []
    for k in range(n):
        phases = []
        for i in range(p):
            if absent is not None and absent[k, i]:
                continue
            reading: Json = {"index": i, "current_a": round(float(current[k, i]), 4)}
            if np.isfinite(temp[k, i]):
                reading["temp_c"] = round(float(temp[k, i]), 3)
            if flags is not None and flags[k, i]:
                reading["breaker_tripped"] = True
            phases.append(reading)
        body: Json = {
            "time": round(float(t[k]), 4),
            "seq": k,
            "vin_v": 12.0 if vin is None else round(float(vin[k]), 4),
            "vout_v": 1.0 if vout is None else round(float(vout[k]), 5),
            "phases": phases,
        }
        if ambient is not None:
            body["ambient_c"] = round(float(ambient[k]), 3)
        out.append(body)
    return out


def _clock(
    n: int, rng: np.random.Generator, step_s: float = 0.5, jitter: float = 0.03
) -> np.ndarray:
    """Sample times with a jittering rack clock (several step lengths, as on real racks)."""
    return T0 + np.cumsum(step_s * (1.0 + jitter * rng.uniform(-1.0, 1.0, n)))


def _heating(
    load_per_phase: np.ndarray, t: np.ndarray, ambient: float, k_per_a: float
) -> np.ndarray:
    """Invented sensor temperatures: a first-order lag (30 s) towards ambient + k * current."""
    target = ambient + k_per_a * load_per_phase
    out = np.empty_like(target)
    out[0] = ambient + 0.5 * (target[0] - ambient)
    for k in range(1, t.size):
        a = 1.0 - np.exp(-(t[k] - t[k - 1]) / 30.0)
        out[k] = out[k - 1] + a * (target[k] - out[k - 1])
    return out


def trip_and_restore() -> Trace:
    """Phase 2's breaker trips at sample 30 and is restored at 60; load 60 A."""
    rng = np.random.default_rng(1)
    n = 90
    t = _clock(n, rng)
    cur = np.full((n, 4), 15.0) + rng.normal(0.0, 0.3, (n, 4))
    tripped = (np.arange(n) >= 30) & (np.arange(n) < 60)
    cur[tripped] = np.array([20.0, 20.0, 0.0, 20.0]) + rng.normal(0.0, 0.3, (int(tripped.sum()), 4))
    flags = np.zeros((n, 4), dtype=bool)
    flags[tripped, 2] = True
    temp = _heating(cur, t, 25.0, 1.2) + rng.normal(0.0, 0.2, (n, 4))
    return Trace("trip", rail_spec(), _bodies(t, cur, temp, flags=flags))


def collapse_and_load_step() -> Trace:
    """Phase 1's current collapses without a flag at 25 (debounced isolation), comes back at
    50; the load steps from 50 A to 95 A at 70 (one more loss would then overload)."""
    rng = np.random.default_rng(2)
    n = 100
    t = _clock(n, rng)
    load = np.where(np.arange(n) >= 70, 95.0, 50.0)
    share = np.ones((n, 4))
    down = (np.arange(n) >= 25) & (np.arange(n) < 50)
    share[down, 1] = 0.0
    cur = load[:, None] * share / share.sum(axis=1, keepdims=True)
    cur += rng.normal(0.0, 0.25, (n, 4))
    temp = _heating(cur, t, 25.0, 1.5) + rng.normal(0.0, 0.2, (n, 4))
    return Trace("collapse", rail_spec(monitor={"debounce_samples": 3}), _bodies(t, cur, temp))


def dropouts_and_supply() -> Trace:
    """Phase 3 stops reporting for 6 samples, temperature readings go missing now and then,
    the input sags below its undervoltage level and the output makes an excursion."""
    rng = np.random.default_rng(3)
    n = 80
    t = _clock(n, rng, step_s=1.0, jitter=0.05)
    cur = np.full((n, 4), 17.0) + rng.normal(0.0, 0.4, (n, 4))
    temp = _heating(cur, t, 30.0, 1.0) + rng.normal(0.0, 0.2, (n, 4))
    temp[rng.uniform(size=(n, 4)) < 0.1] = np.nan
    absent = np.zeros((n, 4), dtype=bool)
    absent[30:36, 3] = True
    vin = np.where((np.arange(n) >= 45) & (np.arange(n) < 50), 9.0, 12.0)
    vout = np.where((np.arange(n) >= 60) & (np.arange(n) < 63), 0.9, 1.0)
    ambient = 30.0 + 0.02 * np.arange(n)
    return Trace(
        "dropout",
        rail_spec(monitor={"debounce_samples": 2}, ambient_c=30.0),
        _bodies(t, cur, temp, absent=absent, ambient=ambient, vin=vin, vout=vout),
    )


def exposed_then_trip() -> Trace:
    """Unequal sharing leaves the rail exposed at 80 A (losing a light phase would overload
    the heavy one); the heavy phase 0 trips at sample 60, leaving it degraded."""
    rng = np.random.default_rng(4)
    n = 90
    t = _clock(n, rng)
    cur = np.tile([24.0, 56.0 / 3, 56.0 / 3, 56.0 / 3], (n, 1))
    trip = np.arange(n) >= 60
    cur[trip] = [0.0, 80.0 / 3, 80.0 / 3, 80.0 / 3]
    cur += rng.normal(0.0, 0.1, (n, 4))
    flags = np.zeros((n, 4), dtype=bool)
    flags[trip, 0] = True
    temp = _heating(cur, t, 25.0, 1.0) + rng.normal(0.0, 0.2, (n, 4))
    spec = rail_spec(monitor={"debounce_samples": 2, "imbalance_pct": 40.0})
    return Trace("exposed", spec, _bodies(t, cur, temp, flags=flags))


def thermal_excursion() -> Trace:
    """Ambient climbs by 45 K and back while the rail carries 85 A: the sensors cross the
    warning line, a limit is forecast, then everything cools again."""
    rng = np.random.default_rng(5)
    n = 90
    t = _clock(n, rng, step_s=2.0)
    ambient = 25.0 + 45.0 * np.clip(np.minimum(np.arange(n) - 15, 75 - np.arange(n)) / 15, 0, 1)
    cur = np.full((n, 4), 85.0 / 4) + rng.normal(0.0, 0.3, (n, 4))
    temp = np.empty((n, 4))
    temp[:] = _heating(cur, t, 0.0, 2.6) + ambient[:, None] + rng.normal(0.0, 0.2, (n, 4))
    spec = rail_spec(phase={**rail_spec()["phase"], "junction_limit_c": 105.0})
    return Trace("thermal", spec, _bodies(t, cur, temp, ambient=ambient))


def cooling_drift() -> Trace:
    """Phase 2 reads 4 K above its model from sample 20 to 55 (its cooling lost for a while)
    on a rail whose drift test is set tight (h 6, k 0.5): a thermal.drift raised and cleared.
    Readings from the network itself (tests/drift_sim.py) at 22.5 A a phase."""
    rng = np.random.default_rng(6)
    n = 90
    t = _clock(n, rng, step_s=1.0, jitter=0.02)
    cur = np.full((n, 4), 22.5)
    _, temp = simulate(np.full((n, 4), 2.44), 1.0, 25.0, rng)
    temp[20:55, 2] += 4.0
    spec = rail_spec(monitor={"drift_threshold": 6.0, "drift_reference": 0.5})
    return Trace("drift", spec, _bodies(t, cur, temp))


TRACES = {
    trace.name: trace
    for trace in (
        trip_and_restore(),
        collapse_and_load_step(),
        dropouts_and_supply(),
        exposed_then_trip(),
        thermal_excursion(),
        cooling_drift(),
    )
}
