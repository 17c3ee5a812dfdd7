"""Reference: the cooling-drift test against outside definitions and computations.

Sources:
* E. S. Page, "Continuous inspection schemes", Biometrika 41 (1954); D. C. Montgomery,
  *Introduction to Statistical Quality Control*, ch. 9.1 (tabular CUSUM), from memory: the
  upper CUSUM S_n = max(0, S_{n-1} + x_n - k), written here as the textbook loop.
* D. Siegmund, *Sequential Analysis*, Springer 1985 (as quoted in Montgomery, ch. 9.1, from
  memory): the one-sided CUSUM's average run length for a mean shift delta (in std) is about
  (exp(-2 D b) + 2 D b - 1) / (2 D^2), D = delta - k, b = h + 1.166. For k = 0.5, h = 4 and no
  shift it gives 336, twice the 168 of Montgomery's two-sided table (from memory).
* Kalman filter theory (Bar-Shalom, Li and Kirubarajan, *Estimation with Applications to
  Tracking and Navigation*, ch. 5.4, from memory): for a filter whose model matches the data,
  the normalised innovations are N(0, 1) and white. Checked on data from the network solved
  mode by mode with scipy.signal.lfilter (tests/drift_sim.py).
* The steady-state filter from scipy.linalg.solve_discrete_are; its DC innovation gain G
  against the filter recursion itself (:func:`kalman_run`) fed a constant excess.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from tests.drift_sim import PROCESS_NOISE_W, SENSOR_NOISE_K, network, simulate, watch

from phaseward.physics.drift import cusum_upper, extra_resistance, steady_innovation
from phaseward.physics.estimator import discrete_model, initial_state, kalman_run
from phaseward.physics.thermal import steady_state_c

F64 = npt.NDArray[np.float64]
NOISE = {"process_noise_w": PROCESS_NOISE_W, "sensor_noise_k": SENSOR_NOISE_K}


def textbook_cusum(x: list[float], start: float) -> list[float]:
    """Page's recursion as printed, one sample at a time; a missing value adds nothing."""
    out, s = [], start
    for value in x:
        if not np.isnan(value):
            s = max(0.0, s + value)
        out.append(s)
    return out


def test_cusum_is_the_textbook_recursion() -> None:
    rng = np.random.default_rng(7)
    for shift, start in ((0.0, 0.0), (0.3, 2.5), (-0.2, 10.0)):
        x = rng.standard_normal(5000) + shift - 0.25
        x[rng.random(5000) < 0.05] = np.nan
        want = textbook_cusum(x.tolist(), start)
        # The closed form sums on a grid of 1e-6: within 1e-6 per sample of the loop.
        np.testing.assert_allclose(cusum_upper(x, start), want, rtol=0, atol=5000 * 1e-6)
    columns = rng.standard_normal((300, 3)) - 0.5
    got = cusum_upper(columns, np.array([0.0, 1.0, 4.0]))
    for c, start in enumerate((0.0, 1.0, 4.0)):
        np.testing.assert_allclose(got[:, c], textbook_cusum(columns[:, c].tolist(), start),
                                   atol=300e-6)  # fmt: skip


def siegmund_arl(shift: float, k: float, h: float) -> float:
    d, b = shift - k, h + 1.166
    return float((np.exp(-2 * d * b) + 2 * d * b - 1) / (2 * d * d))


def run_lengths(shift: float, k: float, h: float, n_runs: int, horizon: int) -> F64:
    rng = np.random.default_rng(11)
    s = cusum_upper(rng.standard_normal((horizon, n_runs)) + shift - k)
    over = s > h
    assert over.any(axis=0).all(), "the horizon must hold every run"
    return np.argmax(over, axis=0).astype(np.float64) + 1.0


def test_run_length_matches_siegmund() -> None:
    """Simulated average run length of the one-sided CUSUM against Siegmund's approximation,
    in control (k 0.5, h 4: 338, about twice Montgomery's two-sided 168) and after a shift
    of one std (about 8). Standard error of each simulated mean: about 2 %."""
    for shift, horizon in ((0.0, 4000), (1.0, 200)):
        lengths = run_lengths(shift, 0.5, 4.0, n_runs=2000, horizon=horizon)
        want = siegmund_arl(shift, 0.5, 4.0)
        assert abs(lengths.mean() / want - 1.0) < 0.07, (shift, lengths.mean(), want)
    assert abs(siegmund_arl(0.0, 0.5, 4.0) / (2 * 168) - 1.0) < 0.02


def test_healthy_innovations_are_standard_normal_and_white() -> None:
    rng = np.random.default_rng(3)
    power = np.full((20000, 3), 2.0) + np.repeat(rng.uniform(-1, 1, (20, 3)), 1000, axis=0)
    _, readings = simulate(power, 1.0, 30.0, rng)
    z = watch(power, readings, 1.0, 30.0, reference=0.25, threshold=35.0).z[200:]
    assert np.all(np.abs(z.mean(axis=0)) < 0.03)  # 3 standard errors of 1/sqrt(20000)
    assert np.all(np.abs(z.std(axis=0) - 1.0) < 0.03)
    lag1 = [np.corrcoef(z[1:, i], z[:-1, i])[0, 1] for i in range(3)]
    assert np.all(np.abs(lag1) < 0.03)
    steady = steady_innovation(discrete_model(network(3), 1.0, **NOISE))
    off = steady.correlation[~np.eye(3, dtype=bool)]
    assert np.all(np.abs(off) < 0.01)  # the channels treat the phases as independent


def test_dc_gain_against_the_filter_recursion() -> None:
    """A settled filter fed readings a constant excess b above its model: the innovation
    settles at G b (the filter recursion, not the closed form)."""
    net = network(2)
    power = np.array([3.0, 1.5])
    slope = np.zeros(2)
    settled = steady_state_c(net, power, slope, 25.0)
    n = 3000
    excess = np.array([2.0, -0.5])
    readings = settled[net.junction_node] + np.zeros((n, 2))
    readings[n // 2 :] += excess
    _, _, _, z = kalman_run(
        net, initial_state(net, settled, std_k=0.5), 1.0, np.tile(power, (n, 1)),
        np.zeros((n, 2)), 25.0, readings, **NOISE,
    )  # fmt: skip
    steady = steady_innovation(discrete_model(net, 1.0, **NOISE))
    # The board's slow mode (minutes) still settles in the last digits: 1e-4.
    np.testing.assert_allclose(z[-1] * steady.std_k, steady.dc_gain @ excess, rtol=1e-4)


def test_extra_resistance_of_a_known_step() -> None:
    """Phase 1's path to the board gains 25 % (2 K/W of 8) after an hour at 2.5 W; later the
    board's path to ambient gains 0.3 K/W. Each estimate lands within three standard errors
    of the truth, and the standard errors are small."""
    rng = np.random.default_rng(5)
    n = 4 * 3600
    power = np.full((n, 3), 2.5)

    def scale(step: int) -> F64:
        return np.array([1.0, 1.25 if step >= 3600 else 1.0, 1.0, 1.0])

    _, readings = simulate(power, 1.0, 25.0, rng, scale=scale)
    run = watch(power, readings, 1.0, 25.0, reference=0.25, threshold=35.0, pieces=4).run
    assert [(c, on) for _, c, on in run.changes] == [(1, True)]
    r, se = extra_resistance(run.window[:, -1, 1])
    assert abs(float(r) - 2.0) < 3 * float(se), (r, se)
    assert float(se) < 0.05

    def board(step: int) -> F64:
        return np.array([1.0, 1.0, 1.0, 1.3 if step >= 3600 else 1.0])

    _, readings = simulate(power, 1.0, 25.0, rng, scale=board, chunk=300)
    run = watch(power, readings, 1.0, 25.0, reference=0.25, threshold=35.0).run
    assert [(c, on) for _, c, on in run.changes] == [(3, True)]  # the board, no phase
    r, se = extra_resistance(run.window[:, -1, 3])
    assert abs(float(r) - 0.3) < 3 * float(se), (r, se)
    assert float(se) < 0.02
