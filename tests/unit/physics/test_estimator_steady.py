"""The steady-gain fast path of kalman_run against the per-sample filter (kalman_step).

Reference: the per-sample Kalman filter itself, one predict/update per step with the full
covariance recursion; its covariance converges to the solution of the discrete algebraic
Riccati equation from ``scipy.linalg.solve_discrete_are`` (checked here too).
"""

import json
from typing import Any

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import linalg

from phaseward.physics import estimator
from phaseward.physics.estimator import (
    EstimatorState,
    KalmanTrace,
    discrete_model,
    initial_state,
    kalman_run,
    kalman_step,
)
from phaseward.physics.thermal import CauerStages, ThermalNetwork, build_coupled_network

FloatArray = npt.NDArray[np.float64]
AGREE_K = 1e-6  # the fast path may differ from the per-sample filter by at most this


def network(n_phases: int, seed: int = 0, board_tau_s: float = 40.0) -> ThermalNetwork:
    """Invented rail: phases of one to three Cauer stages on a shared board."""
    rng = np.random.default_rng(seed)
    chains = []
    for k in range(n_phases):
        stages = 1 + k % 3
        chains.append(
            CauerStages(rng.uniform(1.0, 4.0, stages), np.sort(rng.uniform(0.02, 3.0, stages)))
        )
    board_r = 0.8 / n_phases
    return build_coupled_network(
        chains, board_to_ambient_k_per_w=board_r, board_c_j_per_k=board_tau_s / board_r
    )


def inputs(
    net: ThermalNetwork, n: int, seed: int = 1
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Held losses (constant rows: the slope is constant), ambient and noisy readings."""
    rng = np.random.default_rng(seed)
    n_ph = net.n_phases
    p0 = np.tile(rng.uniform(0.5, 3.0, n_ph), (n, 1))
    slope = np.tile(rng.uniform(0.0, 0.02, n_ph), (n, 1))
    ambient = np.full(n, 30.0)
    readings = 45.0 + rng.normal(0.0, 0.4, (n, n_ph))
    return p0, slope, ambient, readings


def per_sample(
    net: ThermalNetwork,
    start: EstimatorState,
    dt_s: float | FloatArray,
    p0: FloatArray,
    slope: FloatArray,
    ambient: FloatArray,
    readings: FloatArray,
    **kwargs: object,
) -> tuple[FloatArray, FloatArray, EstimatorState]:
    """Means (n + 1, n_states) and normalised innovations (n, n_phases) of the per-sample
    filter; the innovation from the prediction (a step without readings) and S = H P- H^T + R.
    """
    steps = np.broadcast_to(np.asarray(dt_s, dtype=np.float64), ambient.shape)
    state, means, z = start, [start.mean_c], []
    for k in range(ambient.size):
        model = discrete_model(net, float(steps[k]), **kwargs)
        args = (p0[k], slope[k], float(ambient[k]))
        prior = kalman_step(model, state, *args, np.full(net.n_phases, np.nan))
        s = np.diag(prior.cov_k2)[model.sensor_state] + model.sensor_var_k2
        sensed = readings[k] - model.sensor_offset_k - prior.mean_c[model.sensor_state]
        z.append(sensed / np.sqrt(s))
        state = kalman_step(model, state, *args, readings[k])
        means.append(state.mean_c)
    return np.array(means), np.array(z), state


@pytest.fixture
def stretches(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """Lengths of the stretches run with the steady gain (so a test knows the path taken)."""
    seen: list[int] = []
    inner = estimator._steady_stretch

    def spy(*args: Any) -> tuple[FloatArray, FloatArray, FloatArray]:
        out = inner(*args)
        seen.append(out[1].shape[0])
        return out

    monkeypatch.setattr(estimator, "_steady_stretch", spy)
    return seen


def lag_kwargs(net: ThermalNetwork, lag: bool) -> dict[str, object]:
    kwargs: dict[str, object] = {"process_noise_w": 0.2, "sensor_noise_k": 0.4}
    if lag:
        kwargs["sensor_tau_s"] = np.linspace(1.0, 4.0, net.n_phases)
    kwargs["sensor_offset_k"] = np.linspace(-0.5, 0.5, net.n_phases)
    return kwargs


@pytest.mark.parametrize("lag", [False, True])
@pytest.mark.parametrize("n_phases", [1, 3, 6])
def test_fast_path_agrees_with_the_per_sample_filter_after_convergence(
    n_phases: int, lag: bool, stretches: list[int]
) -> None:
    net = network(n_phases, seed=n_phases)
    kwargs = lag_kwargs(net, lag)
    n = 1500
    p0, slope, ambient, readings = inputs(net, n, seed=n_phases)
    start = initial_state(net, 40.0, std_k=3.0, sensor_lag=lag)
    trace = kalman_run(net, start, 1.0, p0, slope, ambient, readings, **kwargs)
    means, z, final = per_sample(net, start, 1.0, p0, slope, ambient, readings, **kwargs)
    assert len(stretches) == 1
    assert 0 < stretches[0] < n - 100
    np.testing.assert_allclose(trace.means_c, means, rtol=0.0, atol=AGREE_K)
    np.testing.assert_allclose(trace.innovation_z, z, rtol=0.0, atol=AGREE_K)
    np.testing.assert_allclose(trace.final.cov_k2, final.cov_k2, rtol=1e-9, atol=1e-14)
    std = np.sqrt(np.diag(final.cov_k2)[net.junction_node])
    np.testing.assert_allclose(trace.junction_std_k[-1], std, rtol=1e-9)


def test_steady_covariance_is_the_riccati_solution() -> None:
    """The covariance the fast path carries is the fixed point the per-sample filter reaches,
    and its prior is scipy.linalg.solve_discrete_are's answer (reference implementation)."""
    net = network(3, seed=5, board_tau_s=10.0)
    kwargs = lag_kwargs(net, True)
    p0, slope, ambient, readings = inputs(net, 3000, seed=5)
    start = initial_state(net, 40.0, std_k=3.0, sensor_lag=True)
    *_, final = per_sample(net, start, 0.5, p0, slope, ambient, readings, **kwargs)
    fast = kalman_run(net, start, 0.5, p0, slope, ambient, readings, **kwargs).final
    np.testing.assert_allclose(fast.cov_k2, final.cov_k2, rtol=1e-10, atol=1e-16)

    model = discrete_model(net, 0.5, **kwargs)
    f = np.array(model.transition)
    f[:, model.junction_state] += model.loss_input_k_per_w * slope[0]  # F + Bp diag(s) S
    h = np.eye(model.n_states)[model.sensor_state]
    r = np.diag(model.sensor_var_k2)
    prior = linalg.solve_discrete_are(f.T, h.T, model.process_cov_k2, r)
    gain = prior @ h.T @ np.linalg.inv(h @ prior @ h.T + r)
    np.testing.assert_allclose(fast.cov_k2, prior - gain @ h @ prior, rtol=1e-8, atol=1e-14)


@pytest.mark.parametrize("lag", [False, True])
def test_an_interval_change_runs_the_full_filter(lag: bool, stretches: list[int]) -> None:
    """A state converged at one step length is not steady at another: the run at the new step
    starts on the full filter and agrees with it from the first step."""
    net = network(3, seed=7)
    kwargs = lag_kwargs(net, lag)
    p0, slope, ambient, readings = inputs(net, 1200, seed=7)
    start = initial_state(net, 40.0, std_k=3.0, sensor_lag=lag)
    converged = kalman_run(net, start, 1.0, p0, slope, ambient, readings, **kwargs).final
    assert len(stretches) == 1
    stretches.clear()
    head = slice(0, 300)
    trace = kalman_run(
        net, converged, 1.3, p0[head], slope[head], ambient[head], readings[head], **kwargs
    )
    means, z, _ = per_sample(
        net, converged, 1.3, p0[head], slope[head], ambient[head], readings[head], **kwargs
    )
    assert stretches == [] or min(stretches) < 300 - 50  # any fast stretch came only later
    np.testing.assert_allclose(trace.means_c, means, rtol=0.0, atol=AGREE_K)
    np.testing.assert_allclose(trace.innovation_z, z, rtol=0.0, atol=AGREE_K)


def test_missing_readings_and_a_slope_change_run_the_full_filter(stretches: list[int]) -> None:
    """From a converged state: a row with a missing reading, then a changed loss slope, each
    leave the steady state; the fast path resumes only after the filter converges again."""
    net = network(4, seed=9, board_tau_s=10.0)
    kwargs = lag_kwargs(net, True)
    n = 2400
    p0, slope, ambient, readings = inputs(net, n, seed=9)
    start = initial_state(net, 40.0, std_k=3.0, sensor_lag=True)
    converged = kalman_run(net, start, 0.5, p0, slope, ambient, readings, **kwargs).final
    stretches.clear()
    readings[100, 2] = np.nan
    slope[1200:] *= 1.5
    trace = kalman_run(net, converged, 0.5, p0, slope, ambient, readings, **kwargs)
    means, z, _ = per_sample(net, converged, 0.5, p0, slope, ambient, readings, **kwargs)
    assert stretches[0] == 100  # fast up to the missing reading
    assert len(stretches) == 3  # then again after re-converging, before and after the change
    np.testing.assert_allclose(trace.means_c, means, rtol=0.0, atol=AGREE_K)
    np.testing.assert_allclose(trace.innovation_z, z, rtol=0.0, atol=AGREE_K, equal_nan=True)
    assert np.isnan(trace.innovation_z[100, 2])
    assert np.all(np.isfinite(trace.innovation_z[101]))
    assert trace.junction_std_k[101, 2] > trace.junction_std_k[100, 2]  # less certain there


def _state_through_json(state: EstimatorState) -> EstimatorState:
    """The estimate as the live state stores it (JSON) and reads it back."""
    text = json.dumps({"mean_c": state.mean_c.tolist(), "cov_k2": state.cov_k2.tolist()})
    back = json.loads(text)
    return EstimatorState(np.array(back["mean_c"]), np.array(back["cov_k2"]))


@settings(
    max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(cuts=st.lists(st.integers(1, 899), max_size=6, unique=True).map(sorted))
def test_the_estimate_does_not_depend_on_the_cut(cuts: list[int], stretches: list[int]) -> None:
    """Cutting one trace into several runs (the state stored as JSON between them, as the
    live state is) gives the same estimate within 1e-8 K, whichever path each run took (a run
    too short for the fast path stays on the full filter)."""
    net = network(3, seed=11, board_tau_s=5.0)
    kwargs = lag_kwargs(net, True)
    n = 900
    p0, slope, ambient, readings = inputs(net, n, seed=11)
    readings[600, 0] = np.nan
    start = initial_state(net, 40.0, std_k=3.0, sensor_lag=True)
    stretches.clear()
    whole = kalman_run(net, start, 0.5, p0, slope, ambient, readings, **kwargs)
    assert len(stretches) == 2  # converged before the missing reading, and again after it
    state, parts = start, []
    for lo, hi in zip([0, *cuts], [*cuts, n], strict=True):
        span = slice(lo, hi)
        part = kalman_run(
            net, state, 0.5, p0[span], slope[span], ambient[span], readings[span], **kwargs
        )
        parts.append(part)
        state = _state_through_json(part.final)
    means = np.vstack([whole.means_c[:1], *[p.means_c[1:] for p in parts]])
    std = np.vstack([whole.junction_std_k[:1], *[p.junction_std_k[1:] for p in parts]])
    np.testing.assert_allclose(means, whole.means_c, rtol=0.0, atol=1e-8)
    np.testing.assert_allclose(std, whole.junction_std_k, rtol=1e-10)
    z = np.vstack([p.innovation_z for p in parts])
    np.testing.assert_allclose(z, whole.innovation_z, rtol=0.0, atol=1e-8, equal_nan=True)


@settings(
    max_examples=20, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    n_phases=st.integers(1, 5),
    seed=st.integers(0, 10**6),
    dt_s=st.floats(0.1, 5.0),
    lag=st.booleans(),
    board_tau_s=st.floats(2.0, 20.0),
)
def test_fast_path_agrees_on_random_rails(
    n_phases: int, seed: int, dt_s: float, lag: bool, board_tau_s: float, stretches: list[int]
) -> None:
    """Any invented rail and step: from the converged state, the steady-gain run (varying
    losses and ambient, constant slope) matches the per-sample filter within 1e-6 K."""
    net = network(n_phases, seed=seed, board_tau_s=board_tau_s)
    kwargs = lag_kwargs(net, lag)
    rng = np.random.default_rng(seed)
    p0, slope, ambient, readings = inputs(net, 200, seed=seed)
    start = initial_state(net, 40.0, std_k=3.0, sensor_lag=lag)
    converged = start
    stretches.clear()  # the fixture is shared by the examples
    for _ in range(30):  # until the filter has converged and switched to the fast path
        converged = kalman_run(
            net, converged, dt_s, p0[[0] * 2000], slope[[0] * 2000], ambient[[0] * 2000],
            readings[[0] * 2000], **kwargs,
        ).final  # fmt: skip
        if stretches:
            break
    assert stretches, "the filter did not converge in 60,000 steps"
    stretches.clear()
    p0 = p0 * rng.uniform(0.5, 1.5, p0.shape)  # the loss varies; its slope does not
    ambient = ambient + rng.normal(0.0, 1.0, ambient.shape)
    trace: KalmanTrace = kalman_run(net, converged, dt_s, p0, slope, ambient, readings, **kwargs)
    means, z, _ = per_sample(net, converged, dt_s, p0, slope, ambient, readings, **kwargs)
    assert stretches == [200]  # the whole run took the fast path
    np.testing.assert_allclose(trace.means_c, means, rtol=0.0, atol=AGREE_K)
    np.testing.assert_allclose(trace.innovation_z, z, rtol=0.0, atol=AGREE_K)
