"""Reference: the junction-temperature Kalman filter against outside computations.

Sources:
* scipy.linalg.solve_discrete_are and scipy.linalg.solve_discrete_lyapunov (reference
  implementations of the discrete Riccati and Lyapunov equations); scipy.signal.cont2discrete
  (zero-order-hold discretisation) and scipy.signal.lsim (continuous linear simulation).
* Kalman filter relations (D. Simon, *Optimal State Estimation*, Wiley 2006, ch. 5, from
  memory): prior covariance P- = F P+ F^T + Q, gain K = P- H^T (H P- H^T + R)^-1,
  P+ = (I - K H) P-, equivalently K = P+ H^T R^-1; in steady state P- solves the discrete
  algebraic Riccati equation. For one state the Riccati equation is a quadratic solved by hand.
* Two first-order lags in series, gains 1, time constants tau1 != tau2 (control textbooks,
  e.g. Ogata, *Modern Control Engineering*, from memory): unit step response
  1 - (tau1 exp(-t/tau1) - tau2 exp(-t/tau2)) / (tau1 - tau2).
* The exact network solution of :func:`phaseward.physics.thermal.simulate_c` for the synthetic
  "true" temperatures, simulated ten times finer than the filter steps.
"""

import numpy as np
import numpy.typing as npt
import pytest
from scipy import linalg, signal

from phaseward.physics import estimator
from phaseward.physics.estimator import discrete_model, initial_state, kalman_run
from phaseward.physics.thermal import (
    CauerStages,
    ThermalNetwork,
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


def single_node(c_j_per_k: float, g_w_per_k: float) -> ThermalNetwork:
    """One junction node with capacitance C to ambient through conductance g."""
    return ThermalNetwork(
        conductance_w_per_k=np.zeros((1, 1)),
        capacitance_j_per_k=np.array([c_j_per_k]),
        ambient_conductance_w_per_k=np.array([g_w_per_k]),
        junction_node=np.array([0]),
        board_node=0,
    )


def test_one_state_steady_gain_matches_riccati() -> None:
    c, g, dt, sigma_w, sigma_v = 4.0, 0.5, 1.0, 0.2, 0.4
    net = single_node(c, g)
    # Hand math: F = exp(-g dt / C); a watt held over dt adds (1 - F) / g kelvin.
    f = np.exp(-g * dt / c)
    b = (1.0 - f) / g
    q, r = (b * sigma_w) ** 2, sigma_v**2
    model = discrete_model(net, dt, process_noise_w=sigma_w, sensor_noise_k=sigma_v)
    assert model.transition[0, 0] == pytest.approx(f, rel=1e-14)
    assert model.loss_input_k_per_w[0, 0] == pytest.approx(b, rel=1e-12)
    # P = F^2 P R / (P + R) + Q  <=>  P^2 + (R (1 - F^2) - Q) P - Q R = 0, positive root.
    lin = r * (1.0 - f**2) - q
    prior_hand = 0.5 * (-lin + np.sqrt(lin**2 + 4.0 * q * r))
    prior = float(linalg.solve_discrete_are(np.array([[f]]), np.eye(1), [[q]], [[r]])[0, 0])
    assert prior == pytest.approx(prior_hand, rel=1e-10)
    gain = prior / (prior + r)

    n = 300
    final, _, std, _ = kalman_run(
        net,
        initial_state(net, 25.0, std_k=5.0),
        dt,
        np.full((n, 1), 1.0),
        np.zeros((n, 1)),
        25.0,
        np.full((n, 1), 27.0),
        process_noise_w=sigma_w,
        sensor_noise_k=sigma_v,
    )
    posterior = final.cov_k2[0, 0]
    assert posterior / r == pytest.approx(gain, rel=1e-10)  # K = P+ H^T R^-1
    assert posterior == pytest.approx((1.0 - gain) * prior, rel=1e-10)
    assert std[-1, 0] == pytest.approx(np.sqrt(posterior), rel=1e-12)


def zoh_model(
    net: ThermalNetwork, dt_s: float, tau_s: FloatArray | None
) -> tuple[FloatArray, FloatArray]:
    """(F, Bp) from scipy.signal.cont2discrete, the continuous model assembled by hand."""
    n, n_ph = net.n_nodes, net.n_phases
    size = n + (0 if tau_s is None else n_ph)
    a = np.zeros((size, size))
    b = np.zeros((size, n_ph))
    c = net.capacitance_j_per_k
    a[:n, :n] = -(net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)) / c[:, None]
    b[net.junction_node, np.arange(n_ph)] = 1.0 / c[net.junction_node]
    if tau_s is not None:
        for p in range(n_ph):
            a[n + p, net.junction_node[p]] = 1.0 / tau_s[p]
            a[n + p, n + p] = -1.0 / tau_s[p]
    f, bd, *_ = signal.cont2discrete(
        (a, b, np.eye(size), np.zeros((size, n_ph))), dt_s, method="zoh"
    )
    return np.asarray(f), np.asarray(bd)


@pytest.mark.parametrize("tau_s", [None, np.array([2.0, 3.0, 5.0])])
def test_network_steady_covariance_matches_riccati(tau_s: FloatArray | None) -> None:
    dt, sigma_w, sigma_v = 1.0, np.array([0.3, 0.2, 0.4]), np.array([0.25, 0.5, 0.3])
    f, bp = zoh_model(NET, dt, tau_s)
    size = f.shape[0]
    model = discrete_model(
        NET, dt, process_noise_w=sigma_w, sensor_noise_k=sigma_v, sensor_tau_s=tau_s
    )
    np.testing.assert_allclose(model.transition, f, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(model.loss_input_k_per_w, bp, rtol=1e-10, atol=1e-14)

    h = np.zeros((3, size))
    sensed = NET.junction_node if tau_s is None else NET.n_nodes + np.arange(3)
    h[np.arange(3), sensed] = 1.0
    q = (bp * sigma_w) @ (bp * sigma_w).T
    r = np.diag(sigma_v**2)
    prior = linalg.solve_discrete_are(f.T, h.T, q, r)
    gain = prior @ h.T @ np.linalg.inv(h @ prior @ h.T + r)
    posterior = (np.eye(size) - gain @ h) @ prior

    n = 3000
    final, _, _, _ = kalman_run(
        NET,
        initial_state(NET, 25.0, std_k=3.0, sensor_lag=tau_s is not None),
        dt,
        np.full((n, 3), 1.5),
        np.zeros((n, 3)),
        25.0,
        np.full((n, 3), 30.0),
        process_noise_w=sigma_w,
        sensor_noise_k=sigma_v,
        sensor_tau_s=tau_s,
    )
    np.testing.assert_allclose(final.cov_k2, posterior, rtol=1e-6, atol=1e-9 * posterior.max())


def test_open_loop_covariance_matches_lyapunov() -> None:
    dt, sigma_w = 5.0, np.array([0.3, 0.2, 0.4])
    f, bp = zoh_model(NET, dt, None)
    q = (bp * sigma_w) @ (bp * sigma_w).T
    stationary = linalg.solve_discrete_lyapunov(f, q)
    n = 4000
    final, _, std, _ = kalman_run(
        NET,
        initial_state(NET, 25.0, std_k=0.0),
        dt,
        np.ones((n, 3)),
        np.zeros((n, 3)),
        25.0,
        np.full((n, 3), np.nan),
        process_noise_w=sigma_w,
        sensor_noise_k=1.0,
    )
    np.testing.assert_allclose(final.cov_k2, stationary, rtol=1e-9)
    np.testing.assert_allclose(std[-1], np.sqrt(np.diag(stationary)[NET.junction_node]))


def test_sensor_lag_step_response_is_two_lags_in_series() -> None:
    c, g, tau_sensor, power_w, dt, n = 4.0, 0.5, 3.0, 2.0, 0.25, 200
    tau_junction = c / g
    net = single_node(c, g)
    _, means, _, _ = kalman_run(
        net,
        initial_state(net, 25.0, std_k=0.0, sensor_lag=True),
        dt,
        np.full((n, 1), power_w),
        np.zeros((n, 1)),
        25.0,
        np.full((n, 1), np.nan),
        process_noise_w=0.0,
        sensor_noise_k=1.0,
        sensor_tau_s=tau_sensor,
    )
    t = np.arange(n + 1) * dt
    rise = power_w / g
    junction = 25.0 + rise * -np.expm1(-t / tau_junction)
    both = tau_junction * np.exp(-t / tau_junction) - tau_sensor * np.exp(-t / tau_sensor)
    sensor = 25.0 + rise * (1.0 - both / (tau_junction - tau_sensor))
    np.testing.assert_allclose(means[:, 0], junction, rtol=1e-12)
    np.testing.assert_allclose(means[:, 1], sensor, rtol=1e-12)


def test_filter_beats_the_raw_lagged_noisy_sensor_on_the_exact_model() -> None:
    """Truth from the exact network (10 sub-steps per filter step), sensor via lsim.

    The true loss carries the disturbance the filter assumes (random power held over each
    filter step, std ``loss_noise_w``), so the filter's std can be held to account too.
    """
    rng = np.random.default_rng(11)
    dt, sub, n, tau, noise_k, offset_k = 0.5, 10, 800, np.array([2.0, 3.0, 4.0]), 0.3, 1.5
    loss_noise_w = 0.05
    p0 = np.repeat(rng.uniform(0.5, 4.0, size=(n // 40, 3)), 40, axis=0)
    slope = np.full((n, 3), 0.01)
    true_p0 = p0 + rng.normal(0.0, loss_noise_w, size=(n, 3))
    fine = simulate_c(
        NET,
        np.full(NET.n_nodes, 25.0),
        dt / sub,
        np.repeat(true_p0, sub, axis=0),
        np.repeat(slope, sub, axis=0),
        25.0,
    )
    junction_fine = fine[:, NET.junction_node]
    t_fine = np.arange(junction_fine.shape[0]) * dt / sub
    sensor_fine = 25.0 + np.stack(
        [
            signal.lsim(([1.0], [tau[p], 1.0]), junction_fine[:, p] - 25.0, t_fine)[1]
            for p in range(3)
        ],
        axis=1,
    )
    truth = junction_fine[sub::sub]  # junctions at t_1 .. t_n
    readings = sensor_fine[sub::sub] + offset_k + rng.normal(0.0, noise_k, size=(n, 3))
    readings[rng.random((n, 3)) < 0.2] = np.nan  # a fifth of the readings missing

    _, means, std, _ = kalman_run(
        NET,
        initial_state(NET, 25.0, std_k=1.0, sensor_lag=True),
        dt,
        p0,
        slope,
        25.0,
        readings,
        process_noise_w=loss_noise_w,
        sensor_noise_k=noise_k,
        sensor_tau_s=tau,
        sensor_offset_k=offset_k,
    )
    filter_error = means[1:, NET.junction_node] - truth
    raw_error = readings - offset_k - truth  # the reading taken as the junction temperature
    rms_filter = float(np.sqrt(np.mean(filter_error**2)))
    rms_raw = float(np.sqrt(np.nanmean(raw_error**2)))
    assert rms_filter < 0.1 * rms_raw
    assert rms_filter < noise_k  # also better than the reading noise alone
    # The filter's own std is an honest account of its error once the start has faded.
    settled = slice(100, None)
    ratio = np.sqrt(np.mean(filter_error[settled] ** 2) / np.mean(std[1:][settled] ** 2))
    assert 0.7 < ratio < 1.4


def textbook_update(
    prior: FloatArray, cov: FloatArray, sensed: npt.NDArray[np.int64], var: FloatArray,
    reading: FloatArray,
) -> tuple[FloatArray, FloatArray]:  # fmt: skip
    """The measurement update written out (Simon 2006, ch. 5, above) with an explicit H over
    the present readings, the inverse of S, and the Joseph form of P+."""
    seen = np.isfinite(reading)
    h = np.zeros((int(seen.sum()), prior.size))
    h[np.arange(h.shape[0]), sensed[seen]] = 1.0
    r = np.diag(var[seen])
    gain = cov @ h.T @ np.linalg.inv(h @ cov @ h.T + r)
    keep = np.eye(prior.size) - gain @ h
    return prior + gain @ (reading[seen] - h @ prior), keep @ cov @ keep.T + gain @ r @ gain.T


@pytest.mark.parametrize("definite", [True, False])
def test_measurement_update_matches_the_textbook_form(definite: bool) -> None:
    """Every reading present, some missing, none; and (``definite`` False) a covariance whose
    sensed block has lost definiteness, as a runaway leaves it, where the filter's Cholesky
    solve cannot run: the update still is the textbook one."""
    rng = np.random.default_rng(3)
    model = discrete_model(NET, 1.0, process_noise_w=0.2, sensor_noise_k=[0.3, 0.5, 0.2],
                           sensor_tau_s=[2.0, 3.0, 5.0])  # fmt: skip
    size = model.n_states
    root = rng.normal(size=(size, size))
    cov = root @ root.T
    if not definite:
        sensed = model.sensor_state[:2]
        cov[np.ix_(sensed, sensed)] = [[1.0, 4.0], [4.0, 1.0]]  # eigenvalues 5 and -3
    prior = 40.0 + rng.normal(size=size)
    for reading in ([41.0, 39.5, 43.0], [41.0, np.nan, 43.0], [np.nan, np.nan, np.nan]):
        reading_c = np.array(reading)
        mean, posterior, _ = estimator._condition(
            prior, cov, model.sensor_state, model.sensor_var_k2, model.sensor_offset_k,
            reading_c,
        )  # fmt: skip
        if np.isnan(reading_c).all():
            assert mean is prior
            assert posterior is cov
            continue
        want_mean, want_cov = textbook_update(
            prior, cov, model.sensor_state, model.sensor_var_k2, reading_c
        )
        np.testing.assert_allclose(mean, want_mean, rtol=1e-10)
        np.testing.assert_allclose(posterior, want_cov, rtol=1e-9, atol=1e-9 * np.abs(cov).max())
