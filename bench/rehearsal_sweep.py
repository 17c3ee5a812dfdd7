"""Benchmark: scoring 1000 protection-setting combinations on a 20,000-sample, 12-phase trace.

Run: ``python -m bench.rehearsal_sweep`` (``python -m bench`` runs every benchmark).
Prints measured times, the baseline, the ratio and
the target; asserts nothing about speed.

``sweep`` (one vectorised pass) against the per-sample Python loop of
``tests/reference/test_ref_rehearsal_loop.py`` (loaded from that file, not copied), which
scores one combination at a time. The loop would take many minutes over all 1000
combinations, so it is timed on a few of them (spread over the grid) and scaled linearly to
1000; its scores on those combinations are compared with the sweep's as a sanity check.
"""

import importlib.util
import time
from pathlib import Path
from types import ModuleType

import numpy as np

from bench.common import Row, median_time, print_rows
from phaseward.physics.rehearsal import (
    FaultLabels,
    ProtectionGrid,
    RehearsalTrace,
    SweepResult,
    pareto_front,
    sweep,
)

N_SAMPLES = 20_000
N_PHASES = 12
LOOP_SUBSET = 3  # combinations the baseline loop is timed on
TARGET = 50.0  # from the issue: the sweep should beat the per-sample loop 50x


def reference_loop() -> ModuleType:
    path = Path(__file__).parents[1] / "tests" / "reference" / "test_ref_rehearsal_loop.py"
    spec = importlib.util.spec_from_file_location("ref_rehearsal_loop", path)
    if spec is None or spec.loader is None:
        raise ImportError(f"cannot load {path}")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def recorded_trace() -> tuple[RehearsalTrace, FaultLabels]:
    """About 20 s at ~1 ms: load steps, a phase that dies, a hot phase, an input sag."""
    rng = np.random.default_rng(11)
    t = np.cumsum(rng.uniform(0.8e-3, 1.2e-3, N_SAMPLES))
    load = np.repeat(rng.uniform(150.0, 350.0, N_SAMPLES // 2000 + 1), 2000)[:N_SAMPLES]
    share = rng.uniform(0.95, 1.05, N_PHASES)
    current = load[:, None] * share / share.sum() + rng.normal(0.0, 0.8, (N_SAMPLES, N_PHASES))
    current[12_000:12_400, 4] = rng.uniform(0.0, 0.6, 400)  # phase 4 dead for 0.4 s
    current[15_000:15_060, 9] *= 1.8  # over-current burst on phase 9
    temp = 70.0 + 0.001 * np.arange(N_SAMPLES)[:, None] + rng.normal(0.0, 0.5, current.shape)
    temp[17_000:, 2] += 25.0  # phase 2 runs hot
    temp[rng.random(temp.shape) < 0.01] = np.nan
    vin = 12.0 + rng.normal(0.0, 0.05, N_SAMPLES)
    vin[8_000:8_100] -= 1.5  # input sag
    trace = RehearsalTrace(t, current, temp, vin)
    labels = FaultLabels(
        start_s=t[[12_000, 15_000, 17_000, 8_000]],
        end_s=t[[12_399, 15_059, 19_999, 8_099]],
        phase=np.array([4, 9, 2, -1]),
        kind=("any", "over_current", "over_temperature", "under_voltage"),
    )
    return trace, labels


def candidate_grid() -> ProtectionGrid:
    """5 x 2 x 5 x 2 x 2 x 5 = 1000 combinations."""
    return ProtectionGrid.product(
        {
            "oc_level_a": [30.0, 34.0, 38.0, 42.0, 46.0],
            "oc_debounce_s": [0.0, 5e-3],
            "imbalance_pct": [10.0, 20.0, 30.0, 40.0, 50.0],
            "imbalance_debounce_s": 20e-3,
            "imbalance_min_load_a": 100.0,
            "dead_floor_a": [1.0, 3.0],
            "dead_debounce_s": [2e-3, 10e-3],
            "dead_others_min_a": 5.0,
            "ot_level_c": 100.0,
            "ot_debounce_s": 50e-3,
            "uv_level_v": 11.0,
            "uv_debounce_s": 1e-3,
            "blanking_s": [0.0, 1e-3, 2e-3, 5e-3, 10e-3],
            "step_a": 20.0,
        }
    )


def rows() -> list[Row]:
    ref = reference_loop()
    trace, labels = recorded_trace()
    grid = candidate_grid()
    result: SweepResult = sweep(trace, grid, labels)
    t_sweep = median_time(lambda: sweep(trace, grid, labels), repeats=3)

    subset = np.linspace(0, grid.size - 1, LOOP_SUBSET).round().astype(int)
    sub_grid = ProtectionGrid({k: v[subset] for k, v in grid.columns.items()})
    start = time.perf_counter()
    want = ref.reference_scores(trace, sub_grid, labels)
    t_loop = (time.perf_counter() - start) / LOOP_SUBSET * grid.size
    agree = (
        np.array_equal(result.trips_by_rule[subset], want.trips_by_rule)
        and np.array_equal(result.false_trips[subset], want.false_trips)
        and np.array_equal(result.latency_s[subset], want.latency_s, equal_nan=True)
    )
    front = pareto_front(result.false_trips, result.mean_latency_s)
    distinct = np.unique(
        np.column_stack([result.false_trips[front], result.mean_latency_s[front]]), axis=0
    )

    print(f"trace: {trace.n_samples} samples x {trace.n_phases} phases, {labels.size} labels")
    print(
        f"grid: {grid.size} combinations; trips per combination {result.trips.min()}.."
        f"{result.trips.max()}, false {result.false_trips.min()}..{result.false_trips.max()}"
    )
    print(
        f"Pareto front (false trips, mean latency): {front.size} combinations, "
        f"{len(distinct)} distinct score pairs"
    )
    print(f"loop agrees with sweep on {LOOP_SUBSET} combinations: {'yes' if agree else 'NO'}")
    return [
        Row(
            f"rehearsal sweep, {grid.size} combinations, vs a per-sample loop",
            f"{t_sweep:.3f} s", f"{t_loop:.1f} s", t_loop / t_sweep, TARGET,
            note=f"loop timed on {LOOP_SUBSET} combinations and scaled; agrees with the sweep: "
            f"{'yes' if agree else 'NO'}",
        )
    ]  # fmt: skip


if __name__ == "__main__":
    print_rows(rows())
