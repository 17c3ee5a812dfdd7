"""Unit tests for phaseward.physics.reliability (Arrhenius, k-out-of-n survival, MTTF)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from phaseward.physics.reliability import (
    arrhenius_factor,
    failure_rate_per_h,
    k_out_of_n_survival,
    mean_time_to_failure_h,
    poisson_binomial_pmf,
    survival_probability,
)

temps_c = st.floats(min_value=-55.0, max_value=200.0)
energies_ev = st.floats(min_value=0.0, max_value=1.5)
probabilities = hnp.arrays(
    np.float64,
    hnp.array_shapes(min_dims=1, max_dims=3, min_side=1, max_side=8),
    elements=st.floats(min_value=0.0, max_value=1.0),
)
rates = st.lists(st.floats(min_value=1e-9, max_value=1e-3), min_size=1, max_size=8)


# --- Arrhenius and failure rates --------------------------------------------------------


def test_arrhenius_is_one_at_the_reference_and_without_activation_energy() -> None:
    assert arrhenius_factor(85.0, ref_temp_c=85.0, activation_ev=0.7) == 1.0
    np.testing.assert_array_equal(
        arrhenius_factor([-40.0, 25.0, 150.0], ref_temp_c=55.0, activation_ev=0.0), 1.0
    )


def test_arrhenius_broadcasts() -> None:
    af = arrhenius_factor(
        np.full((4, 1), 90.0), ref_temp_c=np.arange(3.0) * 10.0, activation_ev=0.7
    )
    assert af.shape == (4, 3)
    assert arrhenius_factor(25.0, ref_temp_c=25.0, activation_ev=0.5).shape == ()


@given(t1=temps_c, t2=temps_c, t3=temps_c, ea=energies_ev)
def test_arrhenius_factors_chain(t1: float, t2: float, t3: float, ea: float) -> None:
    """Going from T1 to T3 via T2 multiplies the factors (ln AF is linear in 1/T)."""
    via = arrhenius_factor(t2, ref_temp_c=t1, activation_ev=ea) * arrhenius_factor(
        t3, ref_temp_c=t2, activation_ev=ea
    )
    assert via == pytest.approx(arrhenius_factor(t3, ref_temp_c=t1, activation_ev=ea), rel=1e-9)


@given(t1=temps_c, t2=temps_c, ea=st.floats(min_value=0.05, max_value=1.5))
def test_arrhenius_grows_with_temperature(t1: float, t2: float, ea: float) -> None:
    lo, hi = sorted((t1, t2))
    af = arrhenius_factor([lo, hi], ref_temp_c=25.0, activation_ev=ea)
    assert af[0] <= af[1]


def test_arrhenius_rejects_bad_arguments() -> None:
    with pytest.raises(ValueError, match="temp_c"):
        arrhenius_factor(-300.0, ref_temp_c=25.0, activation_ev=0.7)
    with pytest.raises(ValueError, match="ref_temp_c"):
        arrhenius_factor(25.0, ref_temp_c=np.nan, activation_ev=0.7)
    with pytest.raises(ValueError, match="activation_ev"):
        arrhenius_factor(25.0, ref_temp_c=25.0, activation_ev=-0.1)
    with pytest.raises(OverflowError, match="arrhenius_factor"):
        arrhenius_factor(1000.0, ref_temp_c=-270.0, activation_ev=1.0)


def test_failure_rate_is_fit_times_acceleration() -> None:
    lam = failure_rate_per_h([0.0, 10.0, 20.0], 105.0, ref_temp_c=55.0, activation_ev=0.7)
    af = arrhenius_factor(105.0, ref_temp_c=55.0, activation_ev=0.7)
    np.testing.assert_allclose(lam, np.array([0.0, 10.0, 20.0]) * 1e-9 * af, rtol=1e-15)
    with pytest.raises(ValueError, match="fit_at_ref"):
        failure_rate_per_h(-1.0, 55.0, ref_temp_c=55.0, activation_ev=0.7)


# --- survival of one phase --------------------------------------------------------------


def test_survival_probability_edges() -> None:
    np.testing.assert_array_equal(survival_probability([0.0, 1e-6, np.inf], 0.0), [1, 1, 0])
    assert survival_probability(0.0, 1e9) == 1.0
    assert survival_probability(np.full((2, 3), 1e-6), np.ones((4, 1, 1))).shape == (4, 2, 3)
    with pytest.raises(ValueError, match="rate_per_h"):
        survival_probability(-1e-6, 10.0)
    with pytest.raises(ValueError, match="rate_per_h"):
        survival_probability(np.nan, 10.0)
    with pytest.raises(ValueError, match="hours"):
        survival_probability(1e-6, -1.0)


@given(
    rate=st.floats(min_value=0.0, max_value=1e-2), h1=st.floats(0.0, 1e6), h2=st.floats(0.0, 1e6)
)
def test_survival_probability_falls_with_hours(rate: float, h1: float, h2: float) -> None:
    lo, hi = sorted((h1, h2))
    p = survival_probability(rate, [lo, hi])
    assert 0.0 <= p[1] <= p[0] <= 1.0


# --- Poisson-binomial and k-out-of-n ----------------------------------------------------


@given(p=probabilities)
def test_pmf_is_a_distribution_with_the_right_moments(p: np.ndarray) -> None:
    pmf = poisson_binomial_pmf(p)
    assert pmf.shape == (*p.shape[:-1], p.shape[-1] + 1)
    assert np.all(pmf >= 0.0)
    np.testing.assert_allclose(pmf.sum(axis=-1), 1.0, rtol=1e-12)
    m = np.arange(p.shape[-1] + 1)
    mean = (pmf * m).sum(axis=-1)
    np.testing.assert_allclose(mean, p.sum(axis=-1), rtol=1e-10, atol=1e-12)
    var = (pmf * m**2).sum(axis=-1) - mean**2
    np.testing.assert_allclose(var, (p * (1.0 - p)).sum(axis=-1), rtol=1e-9, atol=1e-10)


@given(p=probabilities, seed=st.integers(0, 2**32 - 1))
def test_pmf_does_not_depend_on_phase_order(p: np.ndarray, seed: int) -> None:
    order = np.random.default_rng(seed).permutation(p.shape[-1])
    np.testing.assert_allclose(
        poisson_binomial_pmf(p[..., order]), poisson_binomial_pmf(p), rtol=1e-12, atol=1e-15
    )


def test_certain_phases_give_a_point_mass() -> None:
    np.testing.assert_array_equal(poisson_binomial_pmf([1.0, 0.0, 1.0, 1.0]), [0, 0, 0, 1, 0])
    np.testing.assert_array_equal(poisson_binomial_pmf(np.zeros((2, 3)))[:, 0], [1.0, 1.0])


@given(p=probabilities)
def test_survival_falls_with_k(p: np.ndarray) -> None:
    n = p.shape[-1]
    k = np.arange(n + 2).reshape(-1, *[1] * (p.ndim - 1))  # one k per row of a new axis
    surv = k_out_of_n_survival(p[None, ...], k)
    assert surv.shape == (n + 2, *p.shape[:-1])
    assert np.all(np.diff(surv, axis=0) <= 1e-15)
    np.testing.assert_allclose(surv[0], 1.0, rtol=1e-12)
    np.testing.assert_array_equal(surv[-1], 0.0)  # k = n + 1: more phases than there are


@given(rate_list=rates, k=st.integers(0, 9), h1=st.floats(0.0, 1e5), h2=st.floats(0.0, 1e5))
def test_survival_falls_with_hours(rate_list: list[float], k: int, h1: float, h2: float) -> None:
    lo, hi = sorted((h1, h2))
    p = survival_probability(np.array(rate_list), np.array([[lo], [hi]]))
    surv = k_out_of_n_survival(p, k)
    assert surv[1] <= surv[0] * (1.0 + 1e-12) + 1e-15


def test_k_broadcasts_over_the_cases() -> None:
    p = np.array([[0.9, 0.8, 0.7], [0.9, 0.8, 0.0], [0.9, 0.0, 0.0]])
    per_case = k_out_of_n_survival(p, np.array([1, 2, 3]))
    assert per_case.shape == (3,)
    np.testing.assert_allclose(per_case, [1 - 0.1 * 0.2 * 0.3, 0.9 * 0.8, 0.0], rtol=1e-14)
    grid = k_out_of_n_survival(p, np.array([[1], [2]]))
    assert grid.shape == (2, 3)
    np.testing.assert_allclose(grid[1], k_out_of_n_survival(p, 2), rtol=0.0)


def test_k_out_of_n_rejects_bad_arguments() -> None:
    with pytest.raises(ValueError, match="p_survive"):
        k_out_of_n_survival([0.5, 1.5], 1)
    with pytest.raises(ValueError, match="p_survive"):
        k_out_of_n_survival(0.5, 1)
    with pytest.raises(ValueError, match="p_survive"):
        poisson_binomial_pmf([np.nan, 0.5])
    with pytest.raises(ValueError, match="k must be an integer"):
        k_out_of_n_survival([0.5, 0.5], 1.0)
    with pytest.raises(ValueError, match="k must be >= 0"):
        k_out_of_n_survival([0.5, 0.5], -1)
    with pytest.raises(ValueError, match="does not broadcast"):
        k_out_of_n_survival(np.full((3, 2), 0.5), np.array([1, 2]))
    with pytest.raises(ValueError, match="does not broadcast"):
        mean_time_to_failure_h(np.full((3, 2), 1e-6), np.array([1, 2]))


# --- MTTF -------------------------------------------------------------------------------


def test_mttf_edges() -> None:
    rates_h = np.array([[1e-6, 0.0, 0.0], [1e-6, 2e-6, 3e-6], [np.inf, np.inf, 1e-6]])
    mttf = mean_time_to_failure_h(rates_h, np.array([[2], [0], [4], [1]]))
    assert mttf.shape == (4, 3)
    assert np.isinf(mttf[0, 0])  # k = 2 and two phases that never fail
    assert 0.0 < mttf[0, 1] < np.inf
    assert mttf[0, 2] == 0.0  # k = 2 but only one phase left
    assert np.all(np.isinf(mttf[1]))  # k = 0: nothing needed
    np.testing.assert_array_equal(mttf[2], 0.0)  # k = 4: more phases needed than exist
    assert mttf[3, 2] == pytest.approx(1e6, rel=1e-10)  # k = 1, only phase 2 is left
    assert mean_time_to_failure_h([1e-6], 1).shape == ()


def test_a_lost_phase_is_the_same_as_no_phase() -> None:
    with_lost = mean_time_to_failure_h([2e-6, np.inf, 5e-6, 1e-6], 2)
    without = mean_time_to_failure_h([2e-6, 5e-6, 1e-6], 2)
    assert with_lost == pytest.approx(without, rel=1e-10)


@settings(max_examples=40)
@given(rate_list=rates, scale=st.floats(min_value=1e-3, max_value=1e3), data=st.data())
def test_mttf_scales_inversely_with_the_rates(
    rate_list: list[float], scale: float, data: st.DataObject
) -> None:
    k = data.draw(st.integers(1, len(rate_list)))
    base = mean_time_to_failure_h(rate_list, k)
    assert mean_time_to_failure_h(np.array(rate_list) * scale, k) == pytest.approx(
        base / scale, rel=1e-9
    )


@settings(max_examples=40)
@given(rate_list=rates)
def test_mttf_falls_with_k(rate_list: list[float]) -> None:
    n = len(rate_list)
    mttf = mean_time_to_failure_h(rate_list, np.arange(1, n + 1))
    assert np.all(np.diff(mttf) < 0.0)
    # k = n is a series system: the first failure, 1 / sum(rates), exactly exponential.
    assert mttf[-1] == pytest.approx(1.0 / sum(rate_list), rel=1e-10)


def test_mttf_rejects_bad_arguments() -> None:
    with pytest.raises(ValueError, match="rates_per_h"):
        mean_time_to_failure_h([1e-6, -1e-6], 1)
    with pytest.raises(ValueError, match="rates_per_h"):
        mean_time_to_failure_h([1e-6, np.nan], 1)
    with pytest.raises(ValueError, match="rates_per_h"):
        mean_time_to_failure_h(1e-6, 1)
    with pytest.raises(ValueError, match="k must be an integer"):
        mean_time_to_failure_h([1e-6], 0.5)
    with pytest.raises(ValueError, match="rtol"):
        mean_time_to_failure_h([1e-6], 1, rtol=0.0)


def test_mttf_reports_a_missed_tolerance() -> None:
    with pytest.raises(ArithmeticError, match="missed rtol"):
        mean_time_to_failure_h([1e-5, 2e-5, 3e-5, 7e-6], 2, rtol=1e-16)
