"""Unit tests for phaseward.physics.sensing (DCR current sensing, copper law)."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from phaseward.physics.sensing import (
    copper_resistance_ohm,
    dcr_sense_to_current_a,
    uncompensated_reading_error,
)

temps = st.floats(min_value=-40.0, max_value=200.0)
resistances = st.floats(min_value=1e-6, max_value=1.0)


def test_broadcast_shapes() -> None:
    r = copper_resistance_ohm(np.full((3, 1), 1e-3), np.linspace(0.0, 100.0, 4))
    assert r.shape == (3, 4)
    i = dcr_sense_to_current_a(np.ones((5, 6)) * 1e-3, np.full(6, 0.2e-3), np.full((5, 6), 60.0))
    assert i.shape == (5, 6)
    assert uncompensated_reading_error(np.zeros((2, 2))).shape == (2, 2)
    assert copper_resistance_ohm(1.0, 20.0).shape == ()


@given(r_ref=resistances, temp=temps)
def test_resistance_at_its_reference_is_the_reference(r_ref: float, temp: float) -> None:
    assert copper_resistance_ohm(r_ref, temp, ref_temp_c=temp) == pytest.approx(r_ref, rel=1e-12)


@given(r_ref=resistances, ref=temps, t1=temps, t2=temps)
def test_changing_reference_is_transitive(r_ref: float, ref: float, t1: float, t2: float) -> None:
    via_t1 = copper_resistance_ohm(
        copper_resistance_ohm(r_ref, t1, ref_temp_c=ref), t2, ref_temp_c=t1
    )
    assert via_t1 == pytest.approx(copper_resistance_ohm(r_ref, t2, ref_temp_c=ref), rel=1e-12)


@given(r_ref=resistances, t1=temps, t2=temps)
def test_resistance_increases_with_temperature(r_ref: float, t1: float, t2: float) -> None:
    lo, hi = sorted((t1, t2))
    assert copper_resistance_ohm(r_ref, lo) <= copper_resistance_ohm(r_ref, hi)


@given(
    current=st.floats(min_value=-200.0, max_value=200.0),
    dcr_ref=st.floats(min_value=1e-5, max_value=1e-2),
    temp=temps,
    ref=temps,
)
def test_compensated_sensing_inverts_the_winding_drop(
    current: float, dcr_ref: float, temp: float, ref: float
) -> None:
    sense = current * copper_resistance_ohm(dcr_ref, temp, ref_temp_c=ref)
    recovered = dcr_sense_to_current_a(sense, dcr_ref, temp, ref_temp_c=ref)
    assert recovered == pytest.approx(current, rel=1e-12, abs=1e-12)


def test_uncompensated_error_sign() -> None:
    err = uncompensated_reading_error(np.array([0.0, 20.0, 90.0]))
    assert err[0] < 0.0
    assert err[1] == 0.0
    assert err[2] > 0.0
    assert uncompensated_reading_error(55.0, ref_temp_c=55.0) == 0.0


def test_custom_alpha_is_used() -> None:
    r = copper_resistance_ohm(1.0, 30.0, alpha_per_k=0.004)
    assert r == pytest.approx(1.04)


@pytest.mark.parametrize(
    ("kwargs", "name"),
    [
        ({"r_ref_ohm": 0.0, "temp_c": 20.0}, "r_ref_ohm"),
        ({"r_ref_ohm": -1.0, "temp_c": 20.0}, "r_ref_ohm"),
        ({"r_ref_ohm": np.nan, "temp_c": 20.0}, "r_ref_ohm"),
        ({"r_ref_ohm": 1.0, "temp_c": np.inf}, "temp_c"),
        ({"r_ref_ohm": 1.0, "temp_c": -300.0}, "temp_c"),
        ({"r_ref_ohm": 1.0, "temp_c": 20.0, "ref_temp_c": -250.0}, "ref_temp_c"),
        ({"r_ref_ohm": 1.0, "temp_c": 20.0, "alpha_per_k": 0.0}, "alpha_per_k"),
    ],
)
def test_resistance_rejects_bad_arguments(kwargs: dict[str, float], name: str) -> None:
    with pytest.raises(ValueError, match=name):
        copper_resistance_ohm(**kwargs)


def test_sensing_rejects_non_finite_voltage() -> None:
    with pytest.raises(ValueError, match="sense_v"):
        dcr_sense_to_current_a([1e-3, np.inf], 1e-3, 25.0)


def test_missing_readings_propagate_as_nan() -> None:
    current = dcr_sense_to_current_a([5e-3, np.nan, 5e-3], 0.2e-3, [20.0, 20.0, np.nan])
    assert current[0] == pytest.approx(25.0)
    assert np.isnan(current[1:]).all()
