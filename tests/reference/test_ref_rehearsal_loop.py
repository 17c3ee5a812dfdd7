"""Reference: a straightforward per-sample Python loop over the rule definitions of
phaseward.physics.rehearsal (its module docstring), written independently of the vectorised
engine: a state machine per rule and phase that walks the samples one by one, and plain
loops over trips and labels for false trips and latencies.

The sweep (sparse tables, sweep-line counts, binary lifting) and ``rehearse`` must agree with
it exactly on random traces and random grids: same trips (sample, phase, rule, value), same
counts, same latencies. Sample times are drawn on a quarter-second lattice (exact in binary)
so that runs lasting exactly the debounce time and blanking windows ending exactly on a
sample occur often; the loop itself counts time in the trace's integer nanosecond ticks.
Release levels (hysteresis) and the missing-reading policy are walked sample by sample too.
``bench/rehearsal_sweep.py`` times this loop as its baseline.
"""

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from phaseward.physics.rehearsal import (
    RULES,
    FaultLabels,
    ProtectionGrid,
    ProtectionSettings,
    RehearsalTrace,
    hold_readings,
    rehearse,
    sweep,
    to_ticks,
)

FloatArray = npt.NDArray[np.float64]
TripTuple = tuple[int, float, int, str, float]  # sample, time_s, phase, rule, value


def reference_trips(trace: RehearsalTrace, s: ProtectionSettings) -> list[TripTuple]:
    """Trips of one settings set, one sample at a time."""
    t = trace.t_ns.tolist()
    ns = 1_000_000_000
    cur = trace.current_a.tolist()
    temp = trace.temp_c.tolist()
    vin = trace.vin_v.tolist()
    present = trace.active.tolist()
    n, n_phases = len(t), len(cur[0])

    # per sample: load-step blanking (latest step at or before the sample), number of present
    # phases and their total current
    blanked, count, total = [], [], []
    last_step = None
    prev_rail = 0.0
    for k in range(n):
        rail = 0.0
        m = 0
        present_a = 0.0
        for p in range(n_phases):
            rail += cur[k][p]
            if present[k][p]:
                m += 1
                present_a += cur[k][p]
        if k > 0 and abs(rail - prev_rail) > s.step_a:
            last_step = t[k]
        prev_rail = rail
        blanked.append(last_step is not None and t[k] - last_step < round(s.blanking_s * ns))
        count.append(m)
        total.append(present_a)

    def reading(rule: str, k: int, p: int) -> float:
        """The rule's measured value at sample k on phase p; NaN where it is undefined."""
        i = cur[k][p] if p >= 0 else 0.0
        m = count[k]
        if rule == "over_current":
            return math.nan if blanked[k] else i
        if rule == "over_temperature":
            return temp[k][p]
        if rule == "imbalance":
            if blanked[k] or not present[k][p] or not total[k] > s.imbalance_min_load_a:
                return math.nan
            mean = total[k] / m
            return 100.0 * abs(i - mean) / mean
        if rule == "dead_phase":
            if blanked[k] or not present[k][p] or m < 2:
                return math.nan
            others = (total[k] - i) / (m - 1)
            return i if others > s.dead_others_min_a else math.nan
        return vin[k]

    levels = {  # level, debounce, release, +1 for a rising quantity / -1 for a falling one
        "over_current": (s.oc_level_a, s.oc_debounce_s, s.oc_release_a, 1),
        "over_temperature": (s.ot_level_c, s.ot_debounce_s, s.ot_release_c, 1),
        "imbalance": (s.imbalance_pct, s.imbalance_debounce_s, s.imbalance_release_pct, 1),
        "dead_phase": (s.dead_floor_a, s.dead_debounce_s, s.dead_release_a, -1),
        "under_voltage": (s.uv_level_v, s.uv_debounce_s, s.uv_release_v, -1),
    }
    trips: list[TripTuple] = []
    for rule in RULES:
        level, debounce, release, sign = levels[rule]
        if not math.isfinite(level):
            continue
        hysteresis = math.isfinite(release) and sign * release < sign * level
        for p in [-1] if rule == "under_voltage" else range(n_phases):
            run_start = None
            tripped = False
            for k in range(n):
                value = reading(rule, k, p)
                true = not math.isnan(value) and sign * value > sign * level
                if hysteresis:
                    released = math.isnan(value) or sign * value <= sign * release
                else:
                    released = not true
                if released:
                    tripped = False
                if not true:
                    run_start = None
                    continue
                if run_start is None:
                    run_start = t[k]
                if not tripped and run_start <= t[k] - round(debounce * ns):
                    trips.append((k, t[k] / ns, p, rule, value))
                    tripped = True
    order: dict[str, int] = {rule: i for i, rule in enumerate(RULES)}
    return sorted(trips, key=lambda trip: (trip[0], trip[2], order[trip[3]]))


@dataclass
class Scores:
    trips_by_rule: list[list[int]]
    false_trips: list[int]
    latency_s: list[list[float]]


def reference_scores(trace: RehearsalTrace, grid: ProtectionGrid, labels: FaultLabels) -> Scores:
    """Per combination: trips per rule, false trips and label latencies, by plain loops."""
    out = Scores([], [], [])
    ns = 1_000_000_000
    start = to_ticks(labels.start_s, trace.quantum_ns).tolist()
    end = to_ticks(labels.end_s, trace.quantum_ns).tolist()
    for c in range(grid.size):
        trips = reference_trips(trace, grid.settings(c))
        out.trips_by_rule.append([sum(1 for x in trips if x[3] == rule) for rule in RULES])
        false = 0
        for k, _, phase, _, _ in trips:
            time = int(trace.t_ns[k])
            covered = False
            for j in range(labels.size):
                if (phase == -1 or labels.phase[j] == phase) and (start[j] <= time <= end[j]):
                    covered = True
            false += not covered
        out.false_trips.append(false)
        latencies = []
        for j in range(labels.size):
            best = math.inf
            for k, _, phase, rule, _ in trips:
                time = int(trace.t_ns[k])
                counts = labels.kind[j] in (rule, "any")
                if phase == labels.phase[j] and counts and start[j] <= time <= end[j]:
                    best = min(best, time - start[j])
            latencies.append(best / ns if math.isfinite(best) else math.nan)
        out.latency_s.append(latencies)
    return out


def random_case(
    seed: int, n: int = 80, n_phases: int = 3, n_comb: int = 24
) -> tuple[RehearsalTrace, ProtectionGrid, FaultLabels]:
    """A noisy rail with injected faults, a random grid and random labels."""
    rng = np.random.default_rng(seed)
    t = np.cumsum(rng.integers(1, 4, size=n)) * 0.25  # irregular, exact in binary
    current = np.round(rng.normal(10.0, 1.5, size=(n, n_phases)), 1)
    for _ in range(3):  # over-current bursts, dead stretches and load steps
        k, p, w = rng.integers(0, n), rng.integers(0, n_phases), rng.integers(1, 8)
        current[k : k + w, p] = rng.choice([18.0, 25.0, 0.0, 0.5])
        current[rng.integers(0, n) :, :] += rng.choice([-4.0, 6.0])
    temp = np.round(rng.normal(70.0, 8.0, size=(n, n_phases)), 0)
    temp[rng.random(temp.shape) < 0.1] = np.nan
    vin = np.round(rng.normal(12.0, 0.4, size=n), 2)
    vin[rng.random(n) < 0.05] = np.nan
    active = rng.random((n, n_phases)) < 0.92
    trace = RehearsalTrace(t, current, temp, vin, active)

    def pick(values: list[float]) -> FloatArray:
        return rng.choice(np.array(values), size=n_comb)

    grid = ProtectionGrid(
        {
            "oc_level_a": pick([12.0, 15.0, 20.0, np.nan]),
            "oc_debounce_s": pick([0.0, 0.25, 0.5, 1.0]),
            "oc_release_a": pick([np.nan, 8.0, 11.0, 30.0]),
            "ot_release_c": pick([np.nan, 60.0, 75.0]),
            "imbalance_release_pct": pick([np.nan, 5.0, 20.0]),
            "dead_release_a": pick([np.nan, 2.0, 7.0]),
            "uv_release_v": pick([np.nan, 11.8, 12.3]),
            "ot_level_c": pick([70.0, 80.0, np.inf]),
            "ot_debounce_s": pick([0.0, 0.5]),
            "imbalance_pct": pick([15.0, 30.0, 60.0, np.nan]),
            "imbalance_debounce_s": pick([0.0, 0.75]),
            "imbalance_min_load_a": pick([0.0, 25.0]),
            "dead_floor_a": pick([1.0, 5.0, np.nan]),
            "dead_debounce_s": pick([0.0, 0.5, 1.25]),
            "dead_others_min_a": pick([0.0, 8.0]),
            "uv_level_v": pick([11.5, 12.0, np.nan]),
            "uv_debounce_s": pick([0.0, 0.25]),
            "blanking_s": pick([0.0, 0.5, 1.5]),
            "step_a": pick([3.0, 8.0, np.inf]),
        }
    )
    m = int(rng.integers(0, 6))
    start = rng.choice(t, size=m) + rng.choice([-0.25, 0.0, 0.1], size=m)
    phase = rng.integers(-1, n_phases, size=m)
    kinds = [
        str(rng.choice(["any", "under_voltage"] if p == -1 else ["any", *RULES[:4]]))
        for p in phase.tolist()
    ]
    labels = FaultLabels(start, start + rng.choice([0.0, 0.5, 2.0, 6.0], size=m), phase, kinds)
    return trace, grid, labels


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(min_value=0, max_value=2**32 - 1))
def test_sweep_equals_the_per_sample_loop(seed: int) -> None:
    trace, grid, labels = random_case(seed)
    got = sweep(trace, grid, labels)
    want = reference_scores(trace, grid, labels)
    np.testing.assert_array_equal(got.trips_by_rule, want.trips_by_rule)
    np.testing.assert_array_equal(got.trips, np.sum(want.trips_by_rule, axis=1))
    np.testing.assert_array_equal(got.false_trips, want.false_trips)
    latency = np.array(want.latency_s).reshape(grid.size, labels.size)
    np.testing.assert_array_equal(got.latency_s, latency)  # NaN == NaN here
    missed = np.isnan(latency).sum(axis=1)
    np.testing.assert_array_equal(got.missed, missed)
    for c in range(grid.size):
        found = latency[c][~np.isnan(latency[c])]
        mean = float(np.mean(found)) if found.size else math.nan
        worst = float(np.max(latency[c])) if labels.size and missed[c] == 0 else math.nan
        np.testing.assert_allclose(got.mean_latency_s[c], mean, rtol=1e-12)
        np.testing.assert_array_equal(got.max_latency_s[c], worst)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(min_value=0, max_value=2**32 - 1))
def test_rehearse_lists_the_loops_trips(seed: int) -> None:
    trace, grid, _ = random_case(seed, n_comb=6)
    for c in range(grid.size):
        got = [
            (x.sample, x.time_s, x.phase, x.rule, x.value)
            for x in rehearse(trace, grid.settings(c))
        ]
        assert got == reference_trips(trace, grid.settings(c))


def test_the_random_cases_exercise_every_rule_and_both_outcomes() -> None:
    """Guards the generator: the comparison above is only as good as the cases it sees."""
    per_rule = np.zeros(len(RULES))
    detected = missed = hysteresis_mattered = 0
    for seed in range(12):
        trace, grid, labels = random_case(seed)
        res = sweep(trace, grid, labels)
        no_release = ProtectionGrid(
            {k: np.nan if "release" in k else v for k, v in grid.columns.items()}
        )
        hysteresis_mattered += int(np.sum(sweep(trace, no_release).trips != res.trips))
        per_rule += res.trips_by_rule.sum(axis=0)
        detected += int(np.sum(~np.isnan(res.latency_s)))
        missed += int(res.missed.sum())
    assert np.all(per_rule > 0)
    assert detected > 0
    assert missed > 0
    assert hysteresis_mattered > 0


def reference_hold(trace: RehearsalTrace, hold_s: float) -> tuple[FloatArray, FloatArray]:
    """Temperatures and input voltages with each gap filled by the last reading of at most
    hold_s before, one sample at a time."""
    ns = 1_000_000_000
    t = trace.t_ns.tolist()
    columns = [trace.temp_c[:, p].tolist() for p in range(trace.n_phases)]
    columns.append(trace.vin_v.tolist())
    filled = []
    for col in columns:
        out, last_value, last_time = [], math.nan, None
        for k, x in enumerate(col):
            if not math.isnan(x):
                last_value, last_time = x, t[k]
                out.append(x)
            elif last_time is not None and t[k] - last_time <= round(hold_s * ns):
                out.append(last_value)
            else:
                out.append(math.nan)
        filled.append(out)
    return np.array(filled[:-1]).T, np.array(filled[-1])


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(min_value=0, max_value=2**32 - 1),
    hold_s=st.sampled_from([0.0, 0.25, 0.5, 1.0, 3.0]),
)
def test_the_hold_policy_equals_the_per_sample_loop(seed: int, hold_s: float) -> None:
    trace, grid, labels = random_case(seed)
    held = hold_readings(trace, hold_s)
    temp, vin = reference_hold(trace, hold_s)
    np.testing.assert_array_equal(held.temp_c, temp)
    np.testing.assert_array_equal(held.vin_v, vin)
    got = sweep(held, grid, labels)
    want = reference_scores(held, grid, labels)
    np.testing.assert_array_equal(got.trips_by_rule, want.trips_by_rule)


@pytest.mark.parametrize("t0_s", [0.0, 1_764_700_000.0])
def test_ten_identical_bursts_trip_ten_times_from_epoch_and_from_zero(t0_s: float) -> None:
    """Regression (issue 18, item 2): ten identical bursts of three samples (2 ms) at 1 kHz
    with a 2 ms debounce. The exact answer is 10 trips: every burst lasts exactly the
    debounce. Float seconds lost some of them to binary rounding (6 of 10 from epoch times,
    7 of 10 from t = 0)."""
    n = 400
    t = t0_s + np.arange(n) * 1e-3
    current = np.full((n, 1), 10.0)
    for b in range(10):
        current[20 + 37 * b : 23 + 37 * b, 0] = 30.0
    tr = RehearsalTrace(t, current, np.full((n, 1), 50.0), np.full(n, 12.0))
    grid = ProtectionGrid({"oc_level_a": 20.0, "oc_debounce_s": 0.002})
    assert sweep(tr, grid).trips.tolist() == [10]
    assert len(rehearse(tr, grid.settings(0))) == 10
    assert len(reference_trips(tr, grid.settings(0))) == 10
