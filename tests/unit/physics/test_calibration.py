"""Unit tests for phaseward.physics.calibration (Foster fit from a heating or cooling curve)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from phaseward.physics import calibration
from phaseward.physics.calibration import CalibrationFailed, fit_foster
from phaseward.physics.thermal import FosterStages, foster_to_cauer

T_S = np.logspace(-3.0, 2.0, 120)
TRUTH = FosterStages(np.array([0.5, 2.0]), np.array([0.05, 5.0]))
P_W = 10.0


def curve(noise_k: float = 0.02, seed: int = 0, ref_c: float = 30.0) -> np.ndarray:
    noise = np.random.default_rng(seed).normal(0.0, noise_k, T_S.size)
    return ref_c + P_W * TRUTH.zth_k_per_w(T_S) + noise


def test_validation_names_the_argument() -> None:
    temp = curve()
    with pytest.raises(ValueError, match="t_s"):
        fit_foster(T_S[::-1], temp, P_W)
    with pytest.raises(ValueError, match="t_s"):
        fit_foster(T_S - 1.0, temp, P_W)
    with pytest.raises(ValueError, match="temp_c"):
        fit_foster(T_S, temp[:-1], P_W)
    with pytest.raises(ValueError, match="temp_c"):
        fit_foster(T_S, np.where(T_S > 1.0, np.nan, temp), P_W)
    with pytest.raises(ValueError, match="power_w"):
        fit_foster(T_S, temp, 0.0)
    with pytest.raises(ValueError, match="orders"):
        fit_foster(T_S, temp, P_W, orders=(0, 1))
    with pytest.raises(ValueError, match="orders"):
        fit_foster(T_S, temp, P_W, orders=(2, 2))
    with pytest.raises(ValueError, match="t_s"):
        fit_foster(T_S[:5], temp[:5], P_W, orders=(1, 2))
    with pytest.raises(ValueError, match="reference_temp_c"):
        fit_foster(T_S, temp, P_W, reference_temp_c=np.nan)
    with pytest.raises(ValueError, match="location"):
        fit_foster(T_S, temp, P_W, location="case")  # type: ignore[arg-type]


def test_reports_every_order_in_the_order_given() -> None:
    cal = fit_foster(T_S, curve(), P_W, orders=(3, 1, 2), location="sensor")
    assert [f.order for f in cal.fits] == [3, 1, 2]
    assert cal.order == 2
    assert cal.chosen.order == 2
    assert cal.chosen.bic == min(f.bic for f in cal.fits)
    assert (cal.location, cal.cooling, cal.power_w, cal.criterion) == ("sensor", False, P_W, "bic")
    assert cal.fits[1].rms_k > 10 * cal.fits[2].rms_k  # one stage cannot follow two
    for fit in cal.fits:
        assert fit.n_params == 2 * fit.order + 1
        assert fit.r_ci_k_per_w.shape == (fit.order, 2)
        assert fit.tau_ci_s.shape == (fit.order, 2)
        assert fit.reference_temp_ci_c.shape == (2,)


def test_a_known_reference_temperature_is_not_fitted() -> None:
    cal = fit_foster(T_S, curve(), P_W, orders=(2,), reference_temp_c=30.0)
    assert cal.reference_temp_c == 30.0
    assert cal.chosen.n_params == 4
    assert np.all(np.isnan(cal.chosen.reference_temp_ci_c))
    np.testing.assert_allclose(cal.stages.r_k_per_w, TRUTH.r_k_per_w, rtol=0.02)


def test_noise_free_curve_is_recovered_and_the_lowest_exact_order_wins() -> None:
    """RSS at rounding level is floored, so extra stages only add penalty."""
    temp = 30.0 + P_W * TRUTH.zth_k_per_w(T_S)
    cal = fit_foster(T_S, temp, P_W, orders=(2, 3))
    assert cal.order == 2
    np.testing.assert_allclose(cal.stages.r_k_per_w, TRUTH.r_k_per_w, rtol=1e-6)
    np.testing.assert_allclose(cal.stages.tau_s, TRUTH.tau_s, rtol=1e-6)
    assert np.all(np.isfinite([f.bic for f in cal.fits]))


def test_cooling_mirrors_heating() -> None:
    heating = curve(seed=3)
    steady = 30.0 + P_W * TRUTH.r_k_per_w.sum()
    up = fit_foster(T_S, heating, P_W, orders=(2,))
    down = fit_foster(T_S, steady + 30.0 - heating, P_W, orders=(2,), cooling=True)
    np.testing.assert_allclose(down.stages.r_k_per_w, up.stages.r_k_per_w, rtol=1e-5)
    np.testing.assert_allclose(down.stages.tau_s, up.stages.tau_s, rtol=1e-5)
    # mirrored data, mirrored model: T_ref + P sum R e^-x = steady + 30 - (T0 + P sum R (1 - e^-x))
    settles = steady + 30.0 - up.reference_temp_c - P_W * up.stages.r_k_per_w.sum()
    assert down.reference_temp_c == pytest.approx(settles, abs=1e-4)
    assert down.reference_temp_c == pytest.approx(30.0, abs=0.05)


def test_a_fit_that_does_not_converge_is_reported(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(calibration, "_MAX_NFEV", 1)
    with pytest.raises(CalibrationFailed) as err:
        fit_foster(T_S, curve(), P_W, orders=(1, 2))
    assert [f.order for f in err.value.fits] == [1, 2]
    assert not any(f.converged for f in err.value.fits)
    assert all(f.message for f in err.value.fits)


def test_a_stage_the_data_cannot_pin_down_has_no_interval() -> None:
    """Both time constants far beyond the 100 s record: the curve is a straight ramp."""
    t = np.linspace(0.0, 1.0, 60)
    temp = 25.0 + P_W * 2.0 * t / 1e4 + np.random.default_rng(1).normal(0.0, 1e-4, t.size)
    cal = fit_foster(t, temp, P_W, orders=(1, 2))
    two = cal.fits[1]
    assert not two.ci_valid
    assert np.all(np.isnan(two.r_ci_k_per_w))
    assert cal.order == 1


@settings(max_examples=5, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), noise_k=st.sampled_from([0.01, 0.3, 3.0]))
def test_stages_stay_positive_sorted_and_convertible(seed: int, noise_k: float) -> None:
    """Whatever the noise, the fitted stages are a valid Foster model whose time constants
    are sorted and at least 1.2 apart, so the Cauer conversion always applies."""
    cal = fit_foster(T_S, curve(noise_k, seed), P_W, orders=(1, 2, 3))
    for fit in cal.fits:
        tau = fit.stages.tau_s
        assert np.all(fit.stages.r_k_per_w > 0.0)
        assert np.all(tau[1:] >= 1.2 * tau[:-1] * (1.0 - 1e-12))
    cauer = foster_to_cauer(cal.stages)
    assert cauer.r_k_per_w.sum() == pytest.approx(cal.stages.r_k_per_w.sum(), rel=1e-9)


# --- issue 18: honest fits ------------------------------------------------------------------

SLOW = FosterStages(np.array([0.3, 0.6, 0.9]), np.array([0.01, 0.2, 3.0]))  # R_th 1.8 K/W


def slow_curve(t_end_s: float, n: int = 200, noise_k: float = 0.01) -> tuple[np.ndarray, ...]:
    t = np.logspace(-3.0, np.log10(t_end_s), n)
    noise = np.random.default_rng(3).normal(0.0, noise_k, n)
    return t, 25.0 + P_W * SLOW.zth_k_per_w(t) + noise


def test_a_curve_in_the_wrong_direction_is_refused() -> None:
    temp = curve()
    with pytest.raises(calibration.WrongDirection, match="looks like a heating curve"):
        fit_foster(T_S, temp, P_W, cooling=True)
    with pytest.raises(calibration.WrongDirection, match="looks like a cooling curve"):
        fit_foster(T_S, temp[::-1].copy(), P_W)
    flat = 30.0 + np.random.default_rng(0).normal(0.0, 0.02, T_S.size)
    with pytest.raises(calibration.WrongDirection, match="must rise"):
        fit_foster(T_S, flat, P_W)


def test_a_curve_that_ends_early_is_not_settled() -> None:
    """Cut at 0.5 s the slow 3 s stage is unseen; the full 30 s curve pins the total down."""
    short = fit_foster(*slow_curve(0.5), P_W, orders=(1, 2, 3))
    assert not short.chosen.settled
    assert any(w.startswith("not settled") for w in short.warnings)
    full = fit_foster(*slow_curve(30.0), P_W, orders=(1, 2, 3))
    assert full.chosen.settled
    assert not any(w.startswith("not settled") for w in full.warnings)
    low, high = full.chosen.total_r_ci_k_per_w
    assert low < 1.8 < high
    assert full.chosen.total_r_k_per_w == pytest.approx(float(full.stages.r_k_per_w.sum()))


@settings(max_examples=10, deadline=None)
@given(seed=st.integers(0, 2**32 - 1))
def test_intervals_never_go_below_zero(seed: int) -> None:
    """Noise of 0.5 K on a 25 K rise: wide intervals, all positive (log space)."""
    noise = np.random.default_rng(seed).normal(0.0, 0.5, T_S.size)
    cal = fit_foster(T_S, 30.0 + P_W * TRUTH.zth_k_per_w(T_S) + noise, P_W, orders=(1, 2, 3))
    for fit in cal.fits:
        if fit.ci_valid:
            assert np.all(fit.r_ci_k_per_w[:, 0] > 0.0)
            assert np.all(fit.tau_ci_s[:, 0] > 0.0)
            assert fit.total_r_ci_k_per_w[0] > 0.0


def test_few_points_cannot_choose_many_stages() -> None:
    """Ten samples (issue 18): with T_ref fitted not even one stage has 4 points per
    parameter; with T_ref given, one stage (8 points) is tried and the rest skipped."""
    t = np.linspace(0.05, 10.0, 10)
    temp = 25.0 + P_W * TRUTH.zth_k_per_w(t) + np.random.default_rng(2).normal(0.0, 0.05, 10)
    with pytest.raises(ValueError, match=r"^t_s: 10 samples fit no order: order 1 needs 12"):
        fit_foster(t, temp, P_W)
    cal = fit_foster(t, temp, P_W, reference_temp_c=25.0)
    assert cal.order == 1
    assert cal.skipped_orders == (2, 3, 4)


def test_a_wrong_reference_temperature_is_flagged() -> None:
    """The curve starts from 25 degC; 24 degC is given (issue 18, item 5)."""
    t, temp = slow_curve(30.0)
    cal = fit_foster(t, temp, P_W, orders=(1, 2, 3), reference_temp_c=24.0)
    assert cal.reference_offset_k == pytest.approx(1.0, abs=0.05)
    assert cal.reference_offset_ci_k[0] > 0.0
    assert any("reference temperature of 25.0" in w for w in cal.warnings)
    right = fit_foster(t, temp, P_W, orders=(1, 2, 3), reference_temp_c=25.0)
    assert not any("reference temperature" in w for w in right.warnings)


def test_milliseconds_sent_as_seconds_are_flagged() -> None:
    t, temp = slow_curve(30.0)
    cal = fit_foster(t * 1000.0, temp, P_W, orders=(1, 2, 3))
    assert any("milliseconds" in w for w in cal.warnings)
    assert not any("milliseconds" in w for w in fit_foster(t, temp, P_W, orders=(1, 2)).warnings)
