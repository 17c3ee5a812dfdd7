"""Unit tests for phaseward.physics.ripple (argument checks, shapes, properties)."""

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import given
from hypothesis import strategies as st

from phaseward.physics.ripple import (
    duty_cycle,
    gapped_angles_deg,
    inductor_ripple_pp_a,
    interleaved_ripple_pp_a,
    interleaved_ripple_ratio_even,
    output_ripple_voltage_pp_from_waveform_v,
    output_ripple_voltage_pp_v,
    respaced_angles_deg,
    rms_current_a,
)

RAIL = (12.0, 1.0, 0.22e-6, 500e3)  # vin_v, vout_v, inductance_h, fsw_hz (demo values)

duties = st.floats(min_value=0.02, max_value=0.98)
angle_lists = st.lists(st.floats(min_value=0.0, max_value=360.0), min_size=1, max_size=8)


def _ratio(duty: float, angles: npt.ArrayLike) -> float:
    return float(interleaved_ripple_pp_a(1.0, duty, 1.0, (1.0 - duty) * duty, angles))


@pytest.mark.parametrize(("vin", "vout"), [(12.0, 0.0), (12.0, 12.0), (5.0, 6.0), (np.nan, 1.0)])
def test_duty_cycle_rejects_impossible_conversions(vin: float, vout: float) -> None:
    with pytest.raises(ValueError, match="v"):
        duty_cycle(vin, vout)


def test_ripple_and_rms_reject_bad_arguments() -> None:
    with pytest.raises(ValueError, match="inductance_h"):
        inductor_ripple_pp_a(12.0, 1.0, 0.0, 500e3)
    with pytest.raises(ValueError, match="fsw_hz"):
        inductor_ripple_pp_a(12.0, 1.0, 1e-6, -1.0)
    with pytest.raises(ValueError, match="ripple_pp_a"):
        rms_current_a(10.0, -1.0)
    with pytest.raises(ValueError, match="dc_current_a"):
        rms_current_a(np.inf, 1.0)


def test_scalar_kernels_broadcast() -> None:
    assert inductor_ripple_pp_a(12.0, np.array([[1.0], [1.8]]), np.full(3, 1e-6), 4e5).shape == (
        2,
        3,
    )
    assert rms_current_a(np.zeros((4, 1)), np.ones(5)).shape == (4, 5)


def test_ratio_helper_uses_unit_single_phase_ripple() -> None:
    # (Vin - Vout) D / (L fsw) with Vin = 1, L = 1 and fsw = D (1 - D) gives exactly 1.
    assert _ratio(0.3, [0.0]) == pytest.approx(1.0)


def test_batch_shapes() -> None:
    angles = np.array([[0.0, 90.0, 180.0, 270.0], [0.0, 90.0, np.nan, 270.0]])
    assert interleaved_ripple_pp_a(*RAIL, angles).shape == (2,)
    assert interleaved_ripple_pp_a(*RAIL, angles[0]).shape == ()
    assert interleaved_ripple_pp_a(
        np.array([12.0, 10.0, 8.0]), 1.0, 1e-6, 4e5, angles[0]
    ).shape == (3,)
    v = output_ripple_voltage_pp_from_waveform_v(
        *RAIL, angles, capacitance_f=np.array([1e-3, 2e-3]), esr_ohm=0.0
    )
    assert v.shape == (2,)


def test_nan_marks_an_absent_phase() -> None:
    with_nan = interleaved_ripple_pp_a(*RAIL, [[0.0, np.nan, 180.0, 270.0]])
    without = interleaved_ripple_pp_a(*RAIL, [0.0, 180.0, 270.0])
    assert with_nan[0] == pytest.approx(float(without), rel=1e-12)


@pytest.mark.parametrize(
    ("angles", "match"),
    [
        (0.0, "shape"),
        (np.empty(0), "shape"),
        ([0.0, np.inf], "finite"),
        ([[0.0, 90.0], [np.nan, np.nan]], "at least one phase"),
    ],
)
def test_angle_validation(angles: npt.ArrayLike, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        interleaved_ripple_pp_a(*RAIL, angles)


@given(duty=duties, angle=st.floats(min_value=-720.0, max_value=720.0))
def test_single_phase_has_its_own_ripple(duty: float, angle: float) -> None:
    assert _ratio(duty, [angle]) == pytest.approx(1.0, rel=1e-9)


@given(duty=duties, angles=angle_lists, shift=st.floats(min_value=-360.0, max_value=360.0))
def test_rotation_and_permutation_do_not_change_ripple(
    duty: float, angles: list[float], shift: float
) -> None:
    base = _ratio(duty, angles)
    assert _ratio(duty, np.array(angles) + shift) == pytest.approx(base, rel=1e-9, abs=1e-9)
    assert _ratio(duty, angles[::-1]) == pytest.approx(base, rel=1e-9, abs=1e-9)


@given(duty=duties, angles=angle_lists)
def test_output_ripple_is_bounded_by_the_sum_of_phase_ripples(
    duty: float, angles: list[float]
) -> None:
    assert 0.0 <= _ratio(duty, angles) <= len(angles) * (1.0 + 1e-9)


@given(duty=duties, n=st.integers(min_value=1, max_value=12))
def test_phases_at_one_angle_add_up(duty: float, n: int) -> None:
    assert _ratio(duty, [30.0] * n) == pytest.approx(n, rel=1e-9)


def test_even_ratio_validation_and_shape() -> None:
    assert interleaved_ripple_ratio_even(
        np.arange(1, 5)[:, None], np.linspace(0.1, 0.9, 3)
    ).shape == (
        4,
        3,
    )
    for n, d, name in [
        (0, 0.5, "n_phases"),
        (2.5, 0.5, "n_phases"),
        (2, 1.0, "duty"),
        (2, 0.0, "duty"),
    ]:
        with pytest.raises(ValueError, match=name):
            interleaved_ripple_ratio_even(n, d)


def test_even_ratio_vanishes_at_multiples_of_one_over_n() -> None:
    np.testing.assert_allclose(interleaved_ripple_ratio_even(4, [0.25, 0.5, 0.75]), 0.0, atol=1e-12)


def test_angle_helpers() -> None:
    assert gapped_angles_deg(6, [1, 4]).tolist() == [0.0, 120.0, 180.0, 300.0]
    assert respaced_angles_deg(6, [1, 4]).tolist() == [0.0, 90.0, 180.0, 270.0]
    assert gapped_angles_deg(3, []).tolist() == [0.0, 120.0, 240.0]
    assert respaced_angles_deg(5, np.array([0])).tolist() == [0.0, 90.0, 180.0, 270.0]


@pytest.mark.parametrize(
    ("n_total", "lost", "match"),
    [
        (4, [4], "lost"),
        (4, [-1], "lost"),
        (4, [1, 1], "lost"),
        (4, [0.5], "lost"),
        (2, [0, 1], "at least one"),
        (0, [], "n_phases_total"),
        (2.0, [], "n_phases_total"),
    ],
)
def test_angle_helpers_reject_bad_losses(n_total: int, lost: list[float], match: str) -> None:
    for helper in (gapped_angles_deg, respaced_angles_deg):
        with pytest.raises(ValueError, match=match):
            helper(n_total, lost)


def test_simple_voltage_estimate_rejects_bad_arguments() -> None:
    for args, name in [
        ((1.0, 0.0, 0.0, 1e6), "capacitance_f"),
        ((1.0, 1e-3, -1e-3, 1e6), "esr_ohm"),
        ((-1.0, 1e-3, 0.0, 1e6), "ripple_current_pp_a"),
        ((1.0, 1e-3, 0.0, 0.0), "ripple_frequency_hz"),
    ]:
        with pytest.raises(ValueError, match=name):
            output_ripple_voltage_pp_v(*args)


@pytest.mark.parametrize("n", range(1, 9))
@pytest.mark.parametrize("vout", [0.6, 1.0, 1.8, 3.3, 5.0])
@pytest.mark.parametrize("esr", [0.0, 0.2e-3, 1e-3, 5e-3])
def test_exact_voltage_never_exceeds_the_simple_sum_for_even_phases(
    n: int, vout: float, esr: float
) -> None:
    vin, _, inductance, fsw = RAIL
    angles = np.arange(n) * 360.0 / n
    ripple = interleaved_ripple_pp_a(vin, vout, inductance, fsw, angles)
    simple = output_ripple_voltage_pp_v(ripple, 470e-6, esr, n * fsw)
    exact = output_ripple_voltage_pp_from_waveform_v(
        vin, vout, inductance, fsw, angles, capacitance_f=470e-6, esr_ohm=esr
    )
    assert exact <= simple * (1.0 + 1e-9) + 1e-15
    if esr == 0.0:  # the capacitive term alone is exact for the triangle at n fsw
        assert exact == pytest.approx(float(simple), rel=1e-9, abs=1e-15)


@given(duty=duties, esr=st.floats(min_value=0.0, max_value=0.01))
def test_single_phase_voltage_matches_the_simple_sum_without_esr(duty: float, esr: float) -> None:
    args = (1.0, duty, 1e-6, 1e6)
    ripple = inductor_ripple_pp_a(*args)
    exact = output_ripple_voltage_pp_from_waveform_v(*args, [0.0], capacitance_f=1e-4, esr_ohm=esr)
    simple = output_ripple_voltage_pp_v(ripple, 1e-4, esr, 1e6)
    assert exact <= simple * (1.0 + 1e-9)
    no_esr = output_ripple_voltage_pp_from_waveform_v(*args, [0.0], capacitance_f=1e-4, esr_ohm=0.0)
    assert no_esr == pytest.approx(
        float(output_ripple_voltage_pp_v(ripple, 1e-4, 0.0, 1e6)), rel=1e-9
    )


def test_large_capacitor_leaves_only_the_esr_drop() -> None:
    angles = [0.0, 90.0, 180.0]
    ripple = interleaved_ripple_pp_a(*RAIL, angles)
    v = output_ripple_voltage_pp_from_waveform_v(*RAIL, angles, capacitance_f=1e3, esr_ohm=2e-3)
    assert v == pytest.approx(float(ripple) * 2e-3, rel=1e-6)


def test_waveform_voltage_rejects_bad_arguments() -> None:
    with pytest.raises(ValueError, match="capacitance_f"):
        output_ripple_voltage_pp_from_waveform_v(*RAIL, [0.0], capacitance_f=0.0, esr_ohm=0.0)
    with pytest.raises(ValueError, match="esr_ohm"):
        output_ripple_voltage_pp_from_waveform_v(*RAIL, [0.0], capacitance_f=1e-3, esr_ohm=np.nan)
