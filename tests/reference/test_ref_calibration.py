"""Reference: Incropera, DeWitt, Bergman and Lavine, *Fundamentals of Heat and Mass Transfer*,
Example 5.1 (lumped capacitance: thermocouple junction in a gas stream), and
``scipy.optimize.curve_fit`` as the reference implementation of the nonlinear fit and its
covariance.

Data of the example (from memory, as in test_ref_lumped_incropera.py): h = 400 W/m^2K,
k = 20 W/mK, c = 400 J/kgK, rho = 8500 kg/m^3; a spherical junction with time constant 1 s
has D = 0.706 mm; from 25 degC in a 200 degC gas stream it reaches 199 degC after about
5.2 s. A gas step of 175 K on a lumped body is the same curve as a heat input
P = hA x 175 K at a fixed 25 degC surrounding: T = 25 + P R (1 - exp(-t / tau)) with
R = 1 / (hA), tau = rho c D / (6 h). We synthesise that curve from the example's physics
(with 0.05 K of measurement noise), fit it, and read back tau ~ 1 s and the time to 199 degC.

Synthetic 1-, 2- and 3-stage curves with known parameters check the recovery and the
order choice (criterion: BIC, see phaseward.physics.calibration); curve_fit, started at the
same optimum in the plain parametrisation (T0, R_i, tau_i), checks the asymptotic standard
errors that the delta method gives through the log transform.
"""

import numpy as np
import pytest
from scipy import optimize

from phaseward.physics.calibration import CalibrationResult, fit_foster
from phaseward.physics.thermal import FosterStages

H_W_PER_M2K = 400.0
C_J_PER_KGK = 400.0
RHO_KG_PER_M3 = 8500.0
DIAMETER_M = 0.706e-3  # book's answer for tau = 1 s
AREA_M2 = np.pi * DIAMETER_M**2
TAU_S = RHO_KG_PER_M3 * C_J_PER_KGK * DIAMETER_M / (6.0 * H_W_PER_M2K)  # 1.0002 s
R_K_PER_W = 1.0 / (H_W_PER_M2K * AREA_M2)
POWER_W = 175.0 / R_K_PER_W  # the 175 K gas step as an equivalent heat input

# Log-spaced sampling, about 35 points per decade, as a transient recorder would store it.
T_LOG_S = np.logspace(-3.5, 2.3, 200)
NOISE_K = 0.05
NETWORKS = {  # stages: (R K/W, tau s), time constants at least a decade apart
    1: FosterStages(np.array([2.0]), np.array([1.5])),
    2: FosterStages(np.array([0.5, 2.0]), np.array([0.05, 5.0])),
    3: FosterStages(np.array([0.3, 1.0, 2.5]), np.array([0.01, 0.5, 20.0])),
}
ORDERS = {1: (1, 2, 3), 2: (1, 2, 3), 3: (2, 3, 4)}  # below and above the truth
SEEDS = range(5)
P_W = 20.0


def heating_curve(truth: FosterStages, seed: int) -> np.ndarray:
    noise = np.random.default_rng(seed).normal(0.0, NOISE_K, T_LOG_S.size)
    return 25.0 + P_W * truth.zth_k_per_w(T_LOG_S) + noise


# --- Incropera Example 5.1 -----------------------------------------------------------------


def incropera_fit(orders: tuple[int, ...]) -> CalibrationResult:
    t = np.arange(0.0, 10.0, 0.02)  # a thermocouple logged at 50 Hz for 10 s
    rise = 175.0 * -np.expm1(-t / TAU_S)
    temp = 25.0 + rise + np.random.default_rng(51).normal(0.0, NOISE_K, t.size)
    return fit_foster(t, temp, POWER_W, orders=orders)


def test_example_5_1_time_constant_and_time_to_199_degc() -> None:
    np.testing.assert_allclose(TAU_S, 1.0, rtol=1e-3)  # the book: D = 0.706 mm for tau = 1 s
    fit = incropera_fit((1,))
    tau = fit.stages.tau_s[0]
    assert tau == pytest.approx(1.0, rel=5e-3)  # book: 1 s
    assert fit.stages.r_k_per_w[0] == pytest.approx(R_K_PER_W, rel=2e-3)
    assert fit.reference_temp_c == pytest.approx(25.0, abs=0.05)
    lo, hi = fit.chosen.tau_ci_s[0]
    assert lo < TAU_S < hi

    def above_199(t: float) -> float:
        return fit.reference_temp_c + POWER_W * fit.stages.zth_k_per_w(t).item() - 199.0

    t_199 = optimize.brentq(above_199, 0.1, 50.0)
    assert round(t_199, 1) == 5.2  # book: about 5.2 s
    assert t_199 == pytest.approx(TAU_S * np.log(175.0), abs=0.05)  # 5.165 s


def test_example_5_1_the_criterion_picks_one_stage() -> None:
    fit = incropera_fit((1, 2, 3))
    assert fit.order == 1
    assert fit.stages.tau_s[0] == pytest.approx(1.0, rel=5e-3)


# --- recovery of known networks ------------------------------------------------------------


@pytest.mark.parametrize("n_stages", [1, 2, 3])
def test_recovers_known_networks_and_picks_the_order(n_stages: int) -> None:
    """Tolerances: R within 1.5 %, tau within 2.5 % at 0.05 K noise on a 40 to 76 K rise; the
    chosen order is the true one in at least 4 of 5 seeds; the 95 % intervals hold the true
    value for at least 80 % of the parameters (they are asymptotic)."""
    truth = NETWORKS[n_stages]
    right = 0
    inside: list[bool] = []
    for seed in SEEDS:
        cal = fit_foster(T_LOG_S, heating_curve(truth, seed), P_W, orders=ORDERS[n_stages])
        right += cal.order == n_stages
        fit = next(f for f in cal.fits if f.order == n_stages)
        assert fit.converged
        assert fit.ci_valid
        np.testing.assert_allclose(fit.stages.r_k_per_w, truth.r_k_per_w, rtol=0.015)
        np.testing.assert_allclose(fit.stages.tau_s, truth.tau_s, rtol=0.025)
        assert fit.reference_temp_c == pytest.approx(25.0, abs=0.05)
        assert fit.rms_k == pytest.approx(NOISE_K, rel=0.2)
        for ci, value in ((fit.r_ci_k_per_w, truth.r_k_per_w), (fit.tau_ci_s, truth.tau_s)):
            inside += ((ci[:, 0] < value) & (value < ci[:, 1])).tolist()
    assert right >= 4
    assert np.mean(inside) >= 0.8


def test_recovers_a_cooling_curve() -> None:
    """JESD51-14 style: equilibrium under 20 W, power removed at t = 0."""
    truth = NETWORKS[2]
    steady = 25.0 + P_W * truth.r_k_per_w.sum()
    for seed in range(2):
        temp = steady - (heating_curve(truth, seed) - 25.0)
        cal = fit_foster(T_LOG_S, temp, P_W, orders=(1, 2, 3), cooling=True)
        assert cal.order == 2
        np.testing.assert_allclose(cal.stages.r_k_per_w, truth.r_k_per_w, rtol=0.015)
        np.testing.assert_allclose(cal.stages.tau_s, truth.tau_s, rtol=0.025)
        assert cal.reference_temp_c == pytest.approx(25.0, abs=0.05)


# --- the covariance against scipy.optimize.curve_fit ---------------------------------------


def test_intervals_match_curve_fit_covariance() -> None:
    truth = NETWORKS[2]
    temp = heating_curve(truth, 7)
    cal = fit_foster(T_LOG_S, temp, P_W, orders=(2,))
    fit = cal.chosen

    def model(
        t: np.ndarray, t0: float, r1: float, tau1: float, r2: float, tau2: float
    ) -> np.ndarray:
        stages = FosterStages(np.array([r1, r2]), np.array([tau1, tau2]))
        return np.asarray(t0 + P_W * stages.zth_k_per_w(t))

    start = [fit.reference_temp_c, *fit.stages.r_k_per_w, *fit.stages.tau_s]
    start = [start[0], start[1], start[3], start[2], start[4]]
    popt, pcov = optimize.curve_fit(model, T_LOG_S, temp, p0=start)
    np.testing.assert_allclose(popt, start, rtol=1e-5)  # the same optimum
    se = np.sqrt(np.diag(pcov))
    z = 1.959963984540054  # standard normal 97.5 % quantile
    # log-space Wald intervals: ln(high / low) / 2 = z SE(ln x) = z SE(x) / x (delta method)
    half_ln_r = np.log(fit.r_ci_k_per_w[:, 1] / fit.r_ci_k_per_w[:, 0]) / 2.0
    half_ln_tau = np.log(fit.tau_ci_s[:, 1] / fit.tau_ci_s[:, 0]) / 2.0
    half_ref = (fit.reference_temp_ci_c[1] - fit.reference_temp_ci_c[0]) / 2.0
    np.testing.assert_allclose(half_ln_r, z * se[[1, 3]] / popt[[1, 3]], rtol=1e-3)
    np.testing.assert_allclose(half_ln_tau, z * se[[2, 4]] / popt[[2, 4]], rtol=1e-3)
    assert half_ref == pytest.approx(z * se[0], rel=1e-3)
    # the total R_th = R_1 + R_2: its variance from curve_fit's covariance (delta method)
    grad = np.array([0.0, 1.0, 0.0, 1.0, 0.0])
    se_total = float(np.sqrt(grad @ pcov @ grad))
    half_ln_total = np.log(fit.total_r_ci_k_per_w[1] / fit.total_r_ci_k_per_w[0]) / 2.0
    assert half_ln_total == pytest.approx(z * se_total / fit.total_r_k_per_w, rel=1e-3)
