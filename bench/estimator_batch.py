"""Benchmark: the junction-temperature Kalman filter over a batch, steady gain against the full
filter, on the 12-phase rail's network (bench.thermal_capacity.rail: 31 nodes, sensor lag on, so
43 states), one sample per second.

Run: ``python -m bench.estimator_batch`` (``python -m bench`` runs every benchmark).
Prints the times, the baseline, the ratio and the target; asserts nothing about speed.

The filter starts converged (as a rail does after a quarter of an hour at a held load) and
the batch holds the currents (the fast path needs an equal loss slope on every step, see
phaseward.physics.estimator); readings are noisy. ``kalman_run`` is timed as it runs (the
steady gain, its Riccati solution cached after the warm-up call) against the same call with
the fast path switched off (every step on the full filter), with one BLAS thread as the server
runs (Settings.blas_threads). The note gives the largest difference of the two estimates and
the cost of the uncached Riccati solve.
"""

from __future__ import annotations

import os
import time
from collections.abc import Iterator
from contextlib import contextmanager

import numpy as np
from threadpoolctl import threadpool_limits

from bench.common import Row, median_time, print_rows
from bench.thermal_capacity import rail
from phaseward.physics import estimator
from phaseward.physics.estimator import EstimatorState, KalmanTrace, initial_state, kalman_run
from phaseward.physics.losses import loss_coefficients

DT_S = 1.0
AMBIENT_C = 35.0
RAIL_CURRENT_A = 300.0
NOISE = {"process_noise_w": 0.2, "sensor_noise_k": 0.5, "sensor_tau_s": 3.0}
TARGETS = {100: 5.0, 1000: 20.0}  # full filter / steady gain, per batch size


@contextmanager
def full_filter_only() -> Iterator[None]:
    """The fast path off: no stretch is long enough to seek the steady gain."""
    kept = estimator.MIN_STEADY_STEPS
    estimator.MIN_STEADY_STEPS = 10**9
    try:
        yield
    finally:
        estimator.MIN_STEADY_STEPS = kept


def row(n_steps: int) -> Row:
    net, params, weights = rail()
    p0_row, slope_row = loss_coefficients(params, RAIL_CURRENT_A * weights)
    rng = np.random.default_rng(n_steps)

    def batch(n: int) -> tuple[np.ndarray, np.ndarray, float, np.ndarray]:
        readings = 70.0 + rng.normal(0.0, 0.5, (n, net.n_phases))
        return np.tile(p0_row, (n, 1)), np.tile(slope_row, (n, 1)), AMBIENT_C, readings

    start = initial_state(net, 60.0, std_k=3.0, sensor_lag=True)
    converged: EstimatorState = kalman_run(net, start, DT_S, *batch(3000), **NOISE).final
    inputs = batch(n_steps)

    def run() -> KalmanTrace:
        return kalman_run(net, converged, DT_S, *inputs, **NOISE)

    t_fast = median_time(run)
    with full_filter_only():
        full = run()
        t_full = median_time(run)
    fast = run()
    gap = float(np.max(np.abs(fast.means_c - full.means_c)))
    estimator._steady.cache_clear()
    t0 = time.perf_counter()
    run()
    t_cold = time.perf_counter() - t0
    print(
        f"{n_steps} steps: steady gain {t_fast * 1e3:.2f} ms, full filter {t_full * 1e3:.2f} ms, "
        f"first call (Riccati solve) {t_cold * 1e3:.1f} ms, largest gap {gap:.1e} K"
    )
    return Row(
        f"Kalman estimate of a converged 12-phase rail, {n_steps} samples, vs the full filter",
        f"{t_fast * 1e3:.2f} ms",
        f"{t_full * 1e3:.2f} ms",
        t_full / t_fast,
        TARGETS[n_steps],
        note=(
            f"{net.n_nodes + net.n_phases} states, held currents; estimates differ by at most "
            f"{gap:.1e} K; the first call for a network, step and slope solves the Riccati "
            f"equation (that call in all: {t_cold * 1e3:.1f} ms)"
        ),
    )


def rows() -> list[Row]:
    with threadpool_limits(limits=1, user_api="blas"):
        return [row(n) for n in TARGETS]


if __name__ == "__main__":
    print(
        f"load average before the run: {os.getloadavg()[0]:.2f} (2 cores; other work skews times)"
    )
    print_rows(rows())
