"""Unit tests for phaseward.physics.estimator (Kalman filter over the thermal network)."""

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from phaseward.physics.estimator import (
    EstimatorState,
    discrete_model,
    initial_state,
    kalman_run,
    kalman_step,
)
from phaseward.physics.thermal import (
    CauerStages,
    ThermalRunaway,
    build_coupled_network,
    simulate_c,
)

FloatArray = npt.NDArray[np.float64]
CHAINS = [
    CauerStages(np.array([1.5, 4.0]), np.array([0.05, 2.0])),
    CauerStages(np.array([2.0, 3.0, 2.5]), np.array([0.02, 0.5, 8.0])),
    CauerStages(np.array([6.0]), np.array([1.0])),
]
NET = build_coupled_network(CHAINS, board_to_ambient_k_per_w=0.7, board_c_j_per_k=150.0)
NOISE = {"process_noise_w": 0.05, "sensor_noise_k": 0.3}


def profile(n_steps: int, seed: int = 0) -> tuple[FloatArray, FloatArray]:
    """Losses held for 20 steps at a time between 0.5 and 4 W, slope 10 mW/K."""
    rng = np.random.default_rng(seed)
    p0 = np.repeat(rng.uniform(0.5, 4.0, size=(-(-n_steps // 20), 3)), 20, axis=0)[:n_steps]
    return p0, np.full((n_steps, 3), 0.01)


def test_shapes_and_first_row() -> None:
    p0, slope = profile(30)
    start = initial_state(NET, 25.0, std_k=2.0)
    final, means, std, _ = kalman_run(
        NET, start, 0.5, p0, slope, 25.0, np.full((30, 3), 26.0), **NOISE
    )
    assert means.shape == (31, 7)
    assert std.shape == (31, 3)
    assert final.mean_c.shape == (7,)
    assert final.cov_k2.shape == (7, 7)
    np.testing.assert_array_equal(means[0], start.mean_c)
    np.testing.assert_array_equal(std[0], 2.0)
    np.testing.assert_array_equal(means[-1], final.mean_c)

    lagged = initial_state(NET, 25.0, std_k=2.0, sensor_lag=True)
    _, means, std, _ = kalman_run(
        NET, lagged, 0.5, p0, slope, 25.0, np.full((30, 3), 26.0), **NOISE, sensor_tau_s=2.0
    )
    assert means.shape == (31, 10)
    assert std.shape == (31, 3)


def test_step_by_step_equals_run() -> None:
    p0, slope = profile(6)
    readings = np.full((6, 3), 30.0)
    readings[2, 1] = readings[4] = np.nan
    ambient = np.linspace(20.0, 30.0, 6)
    kwargs = NOISE | {"sensor_tau_s": [1.0, 2.0, 3.0], "sensor_offset_k": [0.5, 0.0, -0.5]}
    state = initial_state(NET, 25.0, std_k=1.0, sensor_lag=True)
    final, means, _, _ = kalman_run(NET, state, 0.5, p0, slope, ambient, readings, **kwargs)
    model = discrete_model(NET, 0.5, **kwargs)
    for k in range(6):
        state = kalman_step(model, state, p0[k], slope[k], float(ambient[k]), readings[k])
        np.testing.assert_allclose(state.mean_c, means[k + 1], rtol=1e-13)
    np.testing.assert_allclose(state.cov_k2, final.cov_k2, rtol=1e-12, atol=1e-15)


def test_prediction_only_follows_the_exact_network() -> None:
    p0, slope = profile(40)
    start = initial_state(NET, 25.0, std_k=0.0)
    _, means, _, _ = kalman_run(NET, start, 0.5, p0, slope, 25.0, np.full((40, 3), np.nan), **NOISE)
    expected = simulate_c(NET, np.full(7, 25.0), 0.5, p0, slope, 25.0)
    np.testing.assert_allclose(means, expected, rtol=1e-10)


def test_missing_readings_leave_that_phase_less_certain() -> None:
    p0, slope = profile(50)
    readings = np.full((50, 3), 30.0)
    start = initial_state(NET, 25.0, std_k=3.0)
    kwargs = {"process_noise_w": 0.5, "sensor_noise_k": 0.3}
    _, _, full, _ = kalman_run(NET, start, 0.5, p0, slope, 25.0, readings, **kwargs)
    readings[:, 2] = np.nan
    _, _, std, _ = kalman_run(NET, start, 0.5, p0, slope, 25.0, readings, **kwargs)
    assert std[-1, 2] > 2.0 * full[-1, 2]
    np.testing.assert_allclose(std[-1, :2], full[-1, :2], rtol=1e-2)
    assert np.all(full[-1] < 0.3)  # better than one reading (0.3 K) once readings add up


def test_constant_readings_with_offset_converge_to_the_sensed_temperature() -> None:
    # Losses that hold every junction at 40 degC in steady state; the sensor reads 2 K high.
    net = build_coupled_network([CHAINS[2]], board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    p0 = np.full((2000, 1), 15.0 / 7.0)  # 40 - 25 = P x (6 + 1) K/W
    final, _, _, _ = kalman_run(
        net,
        initial_state(net, 25.0, std_k=10.0, sensor_lag=True),
        0.5,
        p0,
        np.zeros((2000, 1)),
        25.0,
        np.full((2000, 1), 42.0),
        **NOISE,
        sensor_tau_s=4.0,
        sensor_offset_k=2.0,
    )
    np.testing.assert_allclose(final.mean_c, [40.0, 25.0 + 15.0 / 7.0, 40.0], atol=1e-6)


def test_readings_correct_a_biased_loss_model() -> None:
    """Truth dissipates 20 % more than the filter is told; readings pull it back."""
    n = 400
    p0, slope = profile(n, seed=3)
    truth = simulate_c(NET, np.full(7, 25.0), 0.5, 1.2 * p0, 1.2 * slope, 25.0)
    rng = np.random.default_rng(4)
    readings = truth[1:, NET.junction_node] + rng.normal(0.0, 0.3, size=(n, 3))
    start = initial_state(NET, 25.0, std_k=1.0)
    kwargs = {"process_noise_w": 0.5, "sensor_noise_k": 0.3}
    _, filtered, _, _ = kalman_run(NET, start, 0.5, p0, slope, 25.0, readings, **kwargs)
    _, open_loop, _, _ = kalman_run(NET, start, 0.5, p0, slope, 25.0, readings * np.nan, **kwargs)

    def rms(means: FloatArray) -> float:
        error = means[:, NET.junction_node] - truth[:, NET.junction_node]
        return float(np.sqrt(np.mean(error**2)))

    assert rms(filtered) < 0.25 * rms(open_loop)
    assert rms(filtered) < 0.3  # better than the raw readings' own noise


def test_runaway_feedback_raises() -> None:
    net = build_coupled_network([CHAINS[2]], board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    n = 2000  # slope 3 W/K against 1/7 W/K to ambient: growth of about e^(1.5 dt) per step
    readings = np.full((n, 1), np.nan)
    readings[:10] = 30.0  # then silence: the prediction alone grows without bound
    with pytest.raises(ThermalRunaway, match="float64 range"):
        kalman_run(
            net,
            initial_state(net, 25.0, std_k=1.0),
            1.0,
            np.ones((n, 1)),
            np.full((n, 1), 3.0),
            25.0,
            readings,
            **NOISE,
        )
    model = discrete_model(net, 1e3, **NOISE)
    huge = EstimatorState(np.full(2, 1e306), np.eye(2))
    with pytest.raises(ThermalRunaway):
        kalman_step(model, huge, [1.0], [1e3], 25.0, [np.nan])


def test_model_matrices_are_cached_per_network_and_step() -> None:
    a = discrete_model(NET, 0.5, **NOISE)
    b = discrete_model(NET, 0.5, process_noise_w=1.0, sensor_noise_k=1.0)
    assert a.transition is b.transition
    assert discrete_model(NET, 0.25, **NOISE).transition is not a.transition
    assert not a.transition.flags.writeable


@settings(max_examples=40, deadline=None)
@given(
    seen=st.lists(st.booleans(), min_size=60, max_size=60),
    noise_k=st.floats(min_value=0.01, max_value=5.0),
    noise_w=st.floats(min_value=0.0, max_value=2.0),
    lag=st.booleans(),
)
def test_covariance_stays_symmetric_psd_and_readings_only_help(
    seen: list[bool], noise_k: float, noise_w: float, lag: bool
) -> None:
    n = 20
    p0, slope = profile(n)
    mask = np.array(seen).reshape(n, 3)
    readings = np.where(mask, 35.0, np.nan)
    kwargs: dict[str, object] = {
        "process_noise_w": noise_w,
        "sensor_noise_k": noise_k,
        "sensor_tau_s": 3.0 if lag else None,
    }
    start = initial_state(NET, 25.0, std_k=2.0, sensor_lag=lag)
    final, _, std, _ = kalman_run(NET, start, 0.5, p0, slope, 25.0, readings, **kwargs)  # type: ignore[arg-type]
    _, _, blind, _ = kalman_run(NET, start, 0.5, p0, slope, 25.0, readings * np.nan, **kwargs)  # type: ignore[arg-type]
    cov = final.cov_k2
    np.testing.assert_array_equal(cov, cov.T)
    assert np.linalg.eigvalsh(cov)[0] > -1e-12 * np.abs(cov).max()
    assert np.all(std <= blind * (1.0 + 1e-9) + 1e-12)


@settings(max_examples=30, deadline=None)
@given(shift=st.floats(min_value=-50.0, max_value=50.0))
def test_shifting_every_temperature_shifts_the_estimate(shift: float) -> None:
    """With no loss slope the model is linear in temperature: T + d in, T + d out."""
    n = 15
    p0, _ = profile(n)
    zero = np.zeros((n, 3))
    readings = np.full((n, 3), 31.0)
    readings[::4, 1] = np.nan
    start = initial_state(NET, np.linspace(25.0, 30.0, 7), std_k=1.5)
    moved = initial_state(NET, np.linspace(25.0, 30.0, 7) + shift, std_k=1.5)
    _, base, _, _ = kalman_run(NET, start, 0.5, p0, zero, 25.0, readings, **NOISE)
    _, other, _, _ = kalman_run(NET, moved, 0.5, p0, zero, 25.0 + shift, readings + shift, **NOISE)
    np.testing.assert_allclose(other - base, shift, atol=1e-9)


# --- validation -----------------------------------------------------------------------------


def _run(change: dict[str, object]) -> None:
    p0, slope = profile(4)
    args: dict[str, object] = {
        "state": initial_state(NET, 25.0, std_k=1.0),
        "dt_s": 0.5,
        "p0_w": p0,
        "slope_w_per_k": slope,
        "ambient_c": 25.0,
        "measured_c": np.full((4, 3), np.nan),
        "process_noise_w": 0.1,
        "sensor_noise_k": 0.3,
    }
    kalman_run(NET, **(args | change))  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"dt_s": 0.0}, "dt_s"),
        ({"process_noise_w": -1.0}, "process_noise_w"),
        ({"sensor_noise_k": 0.0}, "sensor_noise_k"),
        ({"sensor_noise_k": [0.1, 0.2]}, "sensor_noise_k"),
        ({"sensor_tau_s": -1.0}, "sensor_tau_s"),
        ({"sensor_tau_s": 1.0}, "state"),  # a lag needs the sensor states
        ({"sensor_offset_k": np.inf}, "sensor_offset_k"),
        ({"p0_w": np.ones(3)}, "p0_w"),
        ({"p0_w": np.ones((4, 2))}, "p0_w"),
        ({"p0_w": np.full((4, 3), np.nan)}, "p0_w"),
        ({"slope_w_per_k": np.zeros((5, 3))}, "slope_w_per_k"),
        ({"measured_c": np.full((4, 3), np.inf)}, "measured_c"),
        ({"measured_c": np.ones((3, 3))}, "measured_c"),
        ({"ambient_c": np.ones(3)}, "ambient_c"),
        ({"ambient_c": np.ones((4, 1))}, "ambient_c"),
    ],
)
def test_run_validation_names_the_argument(change: dict[str, object], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        _run(change)


def test_state_validation_names_the_argument() -> None:
    with pytest.raises(ValueError, match="mean_c"):
        EstimatorState(np.array([np.nan]), np.eye(1))
    with pytest.raises(ValueError, match="cov_k2"):
        EstimatorState(np.zeros(2), np.eye(3))
    with pytest.raises(ValueError, match="cov_k2"):
        EstimatorState(np.zeros(2), np.array(1.0))
    with pytest.raises(ValueError, match="cov_k2"):
        EstimatorState(np.zeros(2), np.array([[1.0, 0.5], [0.0, 1.0]]))
    with pytest.raises(ValueError, match="cov_k2"):
        EstimatorState(np.zeros(2), -np.eye(2))
    with pytest.raises(ValueError, match="temps_c"):
        initial_state(NET, np.zeros(3), std_k=1.0)
    with pytest.raises(ValueError, match="std_k"):
        initial_state(NET, 25.0, std_k=-1.0)
    model = discrete_model(NET, 0.5, **NOISE)
    with pytest.raises(ValueError, match="state"):
        kalman_step(
            model, EstimatorState(np.zeros(2), np.eye(2)), [1.0] * 3, [0.0] * 3, 25, [1] * 3
        )
    state = initial_state(NET, 25.0, std_k=1.0)
    with pytest.raises(ValueError, match="measured_c"):
        kalman_step(model, state, [1.0] * 3, [0.0] * 3, 25.0, [1.0] * 2)
    with pytest.raises(ValueError, match="ambient_c"):
        kalman_step(model, state, [1.0] * 3, [0.0] * 3, np.nan, [1.0] * 3)
