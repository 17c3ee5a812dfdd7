"""Unit tests for phaseward.physics.breaker (pass-MOSFET stress during a downstream short)."""

from typing import Any

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from phaseward.physics.breaker import breaker_stress, longest_safe_delay_s, stress_curve
from phaseward.physics.thermal import CauerStages, FosterStages

FOSTER = FosterStages(np.array([0.05, 0.4, 1.5]), np.array([1e-4, 5e-3, 0.5]))
SOA_T = np.array([1e-4, 1e-3, 1e-2, 1e-1])
SOA_I = np.array([100.0, 40.0, 15.0, 6.0])


def case(**changes: Any) -> dict[str, Any]:
    """Keyword arguments of one breaker (12 V, 20 A limit), with ``changes`` applied."""
    base: dict[str, Any] = {
        "vin_v": 12.0,
        "current_limit_a": 20.0,
        "foster": FOSTER,
        "start_temp_c": 50.0,
        "junction_limit_c": 150.0,
        "soa_time_s": SOA_T,
        "soa_current_a": SOA_I,
    }
    base.update(changes)
    return base


@pytest.mark.parametrize(
    ("name", "value"),
    [
        ("vin_v", 0.0),
        ("vin_v", np.inf),
        ("current_limit_a", -1.0),
        ("start_temp_c", np.nan),
        ("junction_limit_c", np.inf),
        ("soa_time_s", [1e-3, 1e-3, 1e-2, 1e-1]),
        ("soa_time_s", [0.0, 1e-3, 1e-2, 1e-1]),
        ("soa_time_s", []),
        ("soa_time_s", [[1e-3, 1e-2]]),
        ("soa_current_a", [100.0, 40.0, 50.0, 6.0]),
        ("soa_current_a", [100.0, 40.0, 0.0, 0.0]),
        ("soa_current_a", [100.0, 40.0, 15.0]),
        ("foster", CauerStages(np.array([1.0]), np.array([1.0]))),
    ],
)
def test_bad_arguments_name_themselves(name: str, value: Any) -> None:
    with pytest.raises(ValueError, match=name):
        breaker_stress(delay_s=1e-3, **case(**{name: value}))
    with pytest.raises(ValueError, match=name):
        longest_safe_delay_s(**case(**{name: value}))


@pytest.mark.parametrize("delay", [0.0, -1e-3, np.nan, np.inf])
def test_bad_delays_are_rejected(delay: float) -> None:
    with pytest.raises(ValueError, match="delay_s"):
        stress_curve(delay_s=[1e-3, delay], **case())


def test_breaker_stress_takes_one_delay() -> None:
    with pytest.raises(ValueError, match="single delay"):
        breaker_stress(delay_s=[1e-3, 2e-3], **case())  # type: ignore[arg-type]


def test_curve_keeps_the_shape_of_the_delays_and_matches_single_calls() -> None:
    delays = np.geomspace(1e-5, 1.0, 12).reshape(3, 4)
    curve = stress_curve(delay_s=delays, **case())
    for field in ("peak_junction_c", "rise_k", "margin_k", "soa_allowed_a", "soa_margin_a"):
        assert getattr(curve, field).shape == (3, 4)
    assert curve.passes.shape == curve.binding.shape == curve.within_soa_data.shape == (3, 4)
    for idx in np.ndindex(delays.shape):
        one = breaker_stress(delay_s=float(delays[idx]), **case())
        assert one.passes == curve.passes[idx]
        assert one.binding == curve.binding[idx]
        # equal up to rounding: vectorised math may round a batch differently from one value
        assert one.margin_k == pytest.approx(curve.margin_k[idx], rel=1e-14, abs=1e-12)
        assert one.soa_margin_a == pytest.approx(curve.soa_margin_a[idx], rel=1e-14, nan_ok=True)


def test_fields_are_consistent() -> None:
    r = breaker_stress(delay_s=2e-3, **case())
    assert r.rise_k == pytest.approx(240.0 * float(FOSTER.zth_k_per_w(2e-3)), rel=1e-15)
    assert r.peak_junction_c == pytest.approx(50.0 + r.rise_k, rel=1e-15)
    assert r.margin_k == pytest.approx(150.0 - r.peak_junction_c, rel=1e-12)
    assert r.soa_margin_a == pytest.approx(r.soa_allowed_a - 20.0, rel=1e-15)
    assert r.within_soa_data
    assert r.passes
    assert r.binding == "none"


def test_tabulated_points_and_short_pulses_use_the_tabulated_current() -> None:
    curve = stress_curve(delay_s=np.concatenate([[1e-6, 5e-5], SOA_T]), **case())
    np.testing.assert_array_equal(curve.soa_allowed_a, np.concatenate([[100.0, 100.0], SOA_I]))


def test_beyond_the_soa_data_does_not_pass() -> None:
    r = breaker_stress(delay_s=0.2, **case(current_limit_a=1.0))
    assert not r.within_soa_data
    assert np.isnan(r.soa_allowed_a)
    assert np.isnan(r.soa_margin_a)
    assert r.margin_k > 0.0  # thermally fine, but the SOA cannot vouch for it
    assert not r.passes
    assert r.binding == "soa"
    hot = breaker_stress(delay_s=0.2, **case(current_limit_a=20.0))
    assert hot.margin_k < 0.0
    assert hot.binding == "thermal"  # a computed thermal failure outranks missing SOA data


def test_binding_when_both_fail_is_the_larger_excess() -> None:
    # At 50 ms the SOA allows 15 A x 5^(ln(6/15)/ln 10) = 7.91 A; Zth(50 ms) = 0.593 K/W.
    soa_only = breaker_stress(delay_s=0.05, **case(current_limit_a=9.0))
    assert soa_only.margin_k > 0.0
    assert soa_only.binding == "soa"
    thermal_only = breaker_stress(delay_s=0.05, **case(current_limit_a=7.0, vin_v=60.0))
    assert thermal_only.soa_margin_a > 0.0
    assert thermal_only.binding == "thermal"
    # 60 V x 9 A = 540 W: rise 320 K = 3.2 x the 100 K headroom, current 1.14 x the SOA's.
    both = breaker_stress(delay_s=0.05, **case(current_limit_a=9.0, vin_v=60.0))
    assert both.margin_k < 0.0
    assert both.soa_margin_a < 0.0
    assert both.binding == "thermal"
    # 12 V x 100 A = 1200 W: rise 711 K = 7.1 x the headroom, current 12.6 x the SOA's.
    both_soa = breaker_stress(delay_s=0.05, **case(current_limit_a=100.0))
    assert both_soa.margin_k < 0.0
    assert both_soa.soa_margin_a < 0.0
    assert both_soa.binding == "soa"


def test_start_at_the_limit_fails_at_once() -> None:
    r = breaker_stress(delay_s=1e-6, **case(start_temp_c=150.0))
    assert r.margin_k < 0.0
    assert r.binding == "thermal"
    assert longest_safe_delay_s(**case(start_temp_c=150.0)) == 0.0
    assert longest_safe_delay_s(**case(start_temp_c=160.0)) == 0.0


def test_current_above_the_shortest_soa_pulse_has_no_safe_delay() -> None:
    assert longest_safe_delay_s(**case(current_limit_a=100.5)) == 0.0
    assert longest_safe_delay_s(**case(current_limit_a=100.0)) > 0.0


def test_passing_at_the_end_of_the_data_returns_the_end_of_the_data() -> None:
    assert longest_safe_delay_s(**case(current_limit_a=2.0)) == SOA_T[-1]
    assert breaker_stress(delay_s=SOA_T[-1], **case(current_limit_a=2.0)).passes


def test_flat_soa_segment_is_safe_to_its_end() -> None:
    flat = case(current_limit_a=15.0, soa_current_a=[100.0, 40.0, 15.0, 15.0], vin_v=1.0)
    assert longest_safe_delay_s(**flat) == SOA_T[-1]
    just_above = case(current_limit_a=15.0, soa_current_a=[100.0, 40.0, 15.0, 14.9], vin_v=1.0)
    d = longest_safe_delay_s(**just_above)  # 15 A is allowed up to 10 ms, no longer
    assert d == pytest.approx(SOA_T[2], rel=1e-11)
    assert d <= SOA_T[2]


def test_single_soa_point() -> None:
    one = case(soa_time_s=[1e-3], soa_current_a=[30.0])
    curve = stress_curve(delay_s=[1e-5, 1e-3, 2e-3], **one)
    np.testing.assert_array_equal(curve.within_soa_data, [True, True, False])
    np.testing.assert_array_equal(curve.soa_allowed_a[:2], [30.0, 30.0])
    assert longest_safe_delay_s(**one) == 1e-3


@given(
    vin=st.floats(min_value=1.0, max_value=80.0),
    current=st.floats(min_value=1.0, max_value=99.0),
    start=st.floats(min_value=-40.0, max_value=140.0),
)
def test_longest_safe_delay_is_the_edge_of_passing(
    vin: float, current: float, start: float
) -> None:
    kw = case(vin_v=vin, current_limit_a=current, start_temp_c=start)
    d = longest_safe_delay_s(**kw)
    assert 0.0 < d <= SOA_T[-1]
    assert breaker_stress(delay_s=d, **kw).passes
    if d < SOA_T[-1]:
        assert not breaker_stress(delay_s=d * (1.0 + 1e-9), **kw).passes


@given(
    vin=st.floats(min_value=1.0, max_value=80.0),
    current=st.floats(min_value=1.0, max_value=150.0),
    start=st.floats(min_value=-40.0, max_value=160.0),
)
def test_margins_fall_with_the_delay(vin: float, current: float, start: float) -> None:
    kw = case(vin_v=vin, current_limit_a=current, start_temp_c=start)
    curve = stress_curve(delay_s=np.geomspace(1e-6, SOA_T[-1], 60), **kw)
    assert np.all(np.diff(curve.margin_k) <= 0.0)
    assert np.all(np.diff(curve.soa_margin_a) <= 1e-12)
    assert np.all(np.diff(curve.passes.astype(int)) <= 0)  # passing delays form (0, d*]
