"""Reference: k-out-of-n reliability, Arrhenius acceleration and MTTF against outside sources.

Sources
-------
* scipy.stats.binom as the reference implementation of the binomial tail (identical phases).
* The definition of the Poisson-binomial distribution, by brute-force enumeration of all 2^n
  survive/fail outcomes (itertools.product), n <= 10.
* M. Rausand and A. Hoyland, *System Reliability Theory: Models, Statistical Methods, and
  Applications*, 2nd ed., Wiley 2004, k-out-of-n structures: for the 2-out-of-3 structure
  R = 3p^2 - 2p^3 and, with identical exponential components, MTTF = (1/lambda)
  sum_{x=k}^{n} 1/x (so 5/(6 lambda) for 2-out-of-3). The formulas are quoted from memory
  (the book is not at hand, section numbers omitted); every number below is a hand
  calculation from them.
* JEDEC JEP122, *Failure Mechanisms and Models for Semiconductor Devices*: the Arrhenius
  acceleration factor AF = exp[(Ea/k)(1/T_use - 1/T_stress)] with absolute temperatures
  (form quoted from memory).
* NIST/SEMATECH e-Handbook of Statistical Methods, section 8.1.5.1 (Arrhenius): Boltzmann's
  constant 8.617e-5 eV/K, and the worked values "acceleration factor between 25 degC and
  125 degC is 133 for Delta H = 0.5 and 17,597 for Delta H = 1.0" (from memory).
* scipy.constants (CODATA Boltzmann constant in eV/K) and scipy.integrate.quad as the
  reference integrator for MTTF = integral of R_sys(t) dt.
"""

import itertools
import math

import numpy as np
import pytest
from scipy import constants, integrate, stats

from phaseward.physics.constants import BOLTZMANN_EV_PER_K, ZERO_CELSIUS_K
from phaseward.physics.reliability import (
    arrhenius_factor,
    failure_rate_per_h,
    k_out_of_n_survival,
    mean_time_to_failure_h,
    poisson_binomial_pmf,
    survival_probability,
)

# --- identical phases: the binomial tail (scipy.stats.binom) ----------------------------


@pytest.mark.parametrize("n", [1, 2, 3, 6, 12, 40])
def test_identical_phases_match_the_binomial_tail(n: int) -> None:
    p = np.linspace(0.0, 1.0, 21)
    k = np.arange(n + 1)
    ours = k_out_of_n_survival(np.repeat(p[:, None], n, axis=1)[None, :, :], k[:, None])
    reference = stats.binom.sf(k[:, None] - 1, n, p[None, :])  # P(X >= k) = sf(k - 1)
    np.testing.assert_allclose(ours, reference, rtol=1e-12, atol=1e-15)
    pmf_reference = stats.binom.pmf(np.arange(n + 1), n, 0.37)
    np.testing.assert_allclose(poisson_binomial_pmf(np.full(n, 0.37)), pmf_reference, rtol=1e-12)


def test_a_six_phase_rail_over_five_years_matches_the_binomial_tail() -> None:
    # 6 phases at 95 degC, 100 FIT at 55 degC, Ea 0.7 eV, 5 years; the rail needs 5 phases.
    lam = failure_rate_per_h(np.full(6, 100.0), 95.0, ref_temp_c=55.0, activation_ev=0.7)
    p = survival_probability(lam, 5 * 8760.0)
    reference = stats.binom.sf(4, 6, math.exp(-float(lam[0]) * 5 * 8760.0))
    assert k_out_of_n_survival(p, 5) == pytest.approx(reference, rel=1e-13)


# --- different phases: brute-force enumeration of all 2^n outcomes ----------------------


def enumerated_pmf(p: np.ndarray) -> np.ndarray:
    """P(exactly m survive) by summing the probability of every survive/fail outcome."""
    pmf = np.zeros(p.size + 1)
    for outcome in itertools.product((0, 1), repeat=p.size):
        alive = np.array(outcome, dtype=bool)
        pmf[alive.sum()] += np.prod(np.where(alive, p, 1.0 - p))
    return pmf


@pytest.mark.parametrize("n", range(1, 11))
def test_poisson_binomial_matches_enumeration(n: int) -> None:
    rng = np.random.default_rng(1000 + n)
    p = rng.uniform(0.0, 1.0, size=(3, n))
    p[1, 0], p[2, :2] = 0.0, 1.0  # a phase already out; phases that cannot fail
    reference = np.array([enumerated_pmf(row) for row in p])
    np.testing.assert_allclose(poisson_binomial_pmf(p), reference, rtol=1e-12, atol=1e-15)
    tail = np.cumsum(reference[:, ::-1], axis=1)[:, ::-1]  # P(X >= k), k = 0..n
    k = np.arange(n + 1)[:, None]
    np.testing.assert_allclose(k_out_of_n_survival(p[None], k), tail.T, rtol=1e-12, atol=1e-15)


# --- handbook k-out-of-n results (Rausand and Hoyland, formulas from memory) -----------


def test_two_out_of_three_hand_calculation() -> None:
    # identical p = 0.9: 3 x 0.81 - 2 x 0.729 = 2.43 - 1.458 = 0.972
    assert k_out_of_n_survival([0.9, 0.9, 0.9], 2) == pytest.approx(0.972, rel=1e-14)
    # different p = (0.95, 0.9, 0.8): p1p2 + p1p3 + p2p3 - 2 p1p2p3
    #   = 0.855 + 0.76 + 0.72 - 2 x 0.684 = 2.335 - 1.368 = 0.967
    assert k_out_of_n_survival([0.95, 0.9, 0.8], 2) == pytest.approx(0.967, rel=1e-14)


def test_identical_mttf_hand_calculation() -> None:
    # 2-out-of-3, lambda = 1e-5 /h: 5 / (6e-5) = 83,333.33 h
    assert mean_time_to_failure_h(np.full(3, 1e-5), 2) == pytest.approx(83333.333333, rel=1e-10)
    # 4-out-of-6, lambda = 2e-6 /h: 5e5 x (1/4 + 1/5 + 1/6) = 5e5 x 0.6166667 = 308,333.33 h
    assert mean_time_to_failure_h(np.full(6, 2e-6), 4) == pytest.approx(308333.333333, rel=1e-10)


def test_two_out_of_three_mttf_with_different_rates_hand_calculation() -> None:
    # R = e^-(l1+l2)t + e^-(l1+l3)t + e^-(l2+l3)t - 2 e^-(l1+l2+l3)t, lambda = (1, 2, 4)e-5:
    # 1/3e-5 + 1/5e-5 + 1/6e-5 - 2/7e-5 = 33,333.33 + 20,000 + 16,666.67 - 28,571.43
    #   = 41,428.57 h
    mttf = mean_time_to_failure_h([1e-5, 2e-5, 4e-5], 2)
    assert mttf == pytest.approx(41428.5714286, rel=1e-10)


# --- MTTF closed form and scipy.integrate.quad ------------------------------------------


@pytest.mark.parametrize(("n", "k"), [(1, 1), (2, 1), (4, 3), (6, 5), (8, 1), (12, 7), (64, 33)])
def test_identical_mttf_closed_form_and_quad(n: int, k: int) -> None:
    lam = 3.7e-6
    closed_form = sum(1.0 / (i * lam) for i in range(k, n + 1))
    # quad in the dimensionless time s = lambda t (QUADPACK's map of [0, inf) wants O(1) scales)
    by_quad_s, _ = integrate.quad(
        lambda s: stats.binom.sf(k - 1, n, math.exp(-s)), 0.0, np.inf, epsrel=1e-12
    )
    by_quad = by_quad_s / lam
    assert by_quad == pytest.approx(closed_form, rel=1e-9)
    assert mean_time_to_failure_h(np.full(n, lam), k) == pytest.approx(closed_form, rel=1e-10)


def enumerated_mttf(rates: np.ndarray, k: int) -> float:
    """Exact MTTF: sum over survivor sets A (|A| >= k) of the integral of
    prod_A e^-l t prod_not A (1 - e^-l t), expanded over the subsets B of the failed ones."""
    total = 0.0
    for alive in itertools.product((0, 1), repeat=rates.size):
        if sum(alive) < k:
            continue
        rate_alive = float(rates[np.array(alive, dtype=bool)].sum())
        failed = rates[~np.array(alive, dtype=bool)]
        for chosen in itertools.product((0, 1), repeat=failed.size):
            rate = rate_alive + float(failed[np.array(chosen, dtype=bool)].sum())
            total += (-1) ** sum(chosen) / rate
    return total


@pytest.mark.parametrize("n", range(1, 7))
def test_mttf_with_different_rates_matches_enumeration_and_quad(n: int) -> None:
    rng = np.random.default_rng(2000 + n)
    rates = 10.0 ** rng.uniform(-8.0, -4.0, size=n)
    k = np.arange(1, n + 1)
    ours = mean_time_to_failure_h(rates, k)
    exact = np.array([enumerated_mttf(rates, int(kk)) for kk in k])
    np.testing.assert_allclose(ours, exact, rtol=1e-9)
    slowest = float(rates.min())  # quad in s = t x the smallest rate, as above
    for kk in k:
        by_quad_s, _ = integrate.quad(
            lambda s, kk=kk: enumerated_pmf(np.exp(-rates / slowest * s))[kk:].sum(),
            0.0,
            np.inf,
            epsrel=1e-10,
            limit=200,
        )
        assert ours[kk - 1] == pytest.approx(by_quad_s / slowest, rel=1e-8)


# --- Arrhenius (JEDEC JEP122 model, NIST/SEMATECH worked values) ------------------------


def test_boltzmann_constant_is_codata_and_the_handbook_value() -> None:
    assert constants.k / constants.e == pytest.approx(BOLTZMANN_EV_PER_K, rel=1e-15)
    assert pytest.approx(8.617e-5, rel=1e-4) == BOLTZMANN_EV_PER_K  # NIST handbook value


@pytest.mark.parametrize("ea", [0.3, 0.7, 1.1])
@pytest.mark.parametrize(("t_use_c", "t_stress_c"), [(25.0, 125.0), (55.0, 150.0), (85.0, 40.0)])
def test_arrhenius_is_the_jep122_model(ea: float, t_use_c: float, t_stress_c: float) -> None:
    t_use_k = t_use_c + constants.zero_Celsius
    t_stress_k = t_stress_c + constants.zero_Celsius
    k_ev = constants.k / constants.e
    expected = math.exp(ea / k_ev * (1.0 / t_use_k - 1.0 / t_stress_k))
    ours = arrhenius_factor(t_stress_c, ref_temp_c=t_use_c, activation_ev=ea)
    assert ours == pytest.approx(expected, rel=1e-13)
    assert constants.zero_Celsius == ZERO_CELSIUS_K


def test_nist_handbook_worked_values() -> None:
    # Handbook (from memory): 25 -> 125 degC gives 133 for 0.5 eV and 17,597 for 1.0 eV. The
    # handbook rounds k to 8.617e-5 eV/K; with CODATA k and 273.15 K we get 132.66 and
    # 17,600, i.e. within 2e-4 of the printed values.
    af = arrhenius_factor(125.0, ref_temp_c=25.0, activation_ev=np.array([0.5, 1.0]))
    assert round(float(af[0])) == 133
    assert af[1] == pytest.approx(17597.0, rel=3e-4)
