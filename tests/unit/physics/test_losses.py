"""Unit tests for phaseward.physics.losses (buck phase losses, affine in temperature)."""

from typing import Any

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from phaseward.physics.losses import (
    LossBreakdown,
    PhaseLossParams,
    loss_coefficients,
    phase_losses,
)

# Invented operating point; expected values are the textbook formulas evaluated by hand.
POINT: dict[str, Any] = {
    "vin_v": 12.0,
    "vout_v": 1.0,
    "fsw_hz": 500e3,
    "inductance_h": 150e-9,
    "dcr_ohm": 0.2e-3,
    "rds_high_ohm": 4e-3,
    "rds_low_ohm": 1e-3,
    "rds_tc_per_k": 0.004,
    "rise_time_s": 5e-9,
    "fall_time_s": 5e-9,
    "gate_charge_c": 40e-9,
    "drive_v": 5.0,
    "dead_time_s": 20e-9,
    "diode_drop_v": 0.7,
    "core_loss_w": 0.3,
}
DUTY = 1.0 / 12.0
RIPPLE_PP_A = (12.0 - 1.0) * DUTY / (150e-9 * 500e3)  # 12.2222 A
TERMS = (
    "high_side_w",
    "low_side_w",
    "switching_w",
    "gate_w",
    "dead_time_w",
    "inductor_copper_w",
    "core_w",
    "stage_table_w",
)


def params(n: int = 1, /, **changes: Any) -> PhaseLossParams:
    return PhaseLossParams.build(n, **(POINT | changes))


def test_terms_match_hand_calculation_at_reference_temperature() -> None:
    rms_sq = 20.0**2 + RIPPLE_PP_A**2 / 12.0  # 412.448 A^2
    loss = phase_losses(params(), 20.0, 25.0)
    expected = {
        "high_side_w": DUTY * rms_sq * 4e-3,
        "low_side_w": (1.0 - DUTY) * rms_sq * 1e-3,
        "switching_w": 0.5 * 12.0 * 20.0 * 10e-9 * 500e3,  # 0.6 W
        "gate_w": 40e-9 * 5.0 * 500e3,  # 0.1 W
        "dead_time_w": 2.0 * 0.7 * 20.0 * 20e-9 * 500e3,  # 0.28 W
        "inductor_copper_w": rms_sq * 0.2e-3 * (1.0 + 0.00393 * 5.0),  # DCR given at 20 degC
        "core_w": 0.3,
        "stage_table_w": 0.0,
    }
    for name, value in expected.items():
        assert getattr(loss, name)[0] == pytest.approx(value, rel=1e-12), name
    assert loss.total_w[0] == pytest.approx(sum(expected.values()), rel=1e-12)


def test_conduction_follows_rds_temperature_coefficient() -> None:
    cold = phase_losses(params(), 30.0, 25.0)
    hot = phase_losses(params(), 30.0, 125.0)
    assert hot.high_side_w[0] / cold.high_side_w[0] == pytest.approx(1.4, rel=1e-12)
    assert hot.low_side_w[0] / cold.low_side_w[0] == pytest.approx(1.4, rel=1e-12)
    assert hot.switching_w[0] == cold.switching_w[0]
    assert hot.inductor_copper_w[0] / cold.inductor_copper_w[0] == pytest.approx(
        (1.0 + 0.00393 * 105.0) / (1.0 + 0.00393 * 5.0), rel=1e-12
    )


def test_zero_current_keeps_gate_core_and_ripple_losses() -> None:
    loss = phase_losses(params(), 0.0, 25.0)
    assert loss.switching_w[0] == 0.0
    assert loss.dead_time_w[0] == 0.0
    assert loss.gate_w[0] == pytest.approx(0.1)
    assert loss.core_w[0] == pytest.approx(0.3)
    assert loss.low_side_w[0] == pytest.approx((1.0 - DUTY) * RIPPLE_PP_A**2 / 12.0 * 1e-3)


def test_negative_current_loses_like_positive() -> None:
    pos = phase_losses(params(), 25.0, 60.0).total_w
    neg = phase_losses(params(), -25.0, 60.0).total_w
    np.testing.assert_allclose(neg, pos, rtol=1e-14)


def test_shapes_broadcast_over_samples() -> None:
    p = params(3, dcr_ohm=[0.1e-3, 0.2e-3, 0.3e-3])
    loss = phase_losses(p, np.ones((5, 3)) * 10.0, np.linspace(20.0, 90.0, 5)[:, None])
    for name in TERMS:
        assert getattr(loss, name).shape == (5, 3), name
    assert phase_losses(p, 10.0, 25.0).total_w.shape == (3,)
    p0, slope = loss_coefficients(p, np.ones((7, 3)))
    assert p0.shape == slope.shape == (7, 3)
    with pytest.raises(ValueError, match="n_phases"):
        phase_losses(p, np.ones(4), 25.0)


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"inductance_h": 0.0}, "inductance_h"),
        ({"fsw_hz": -1.0}, "fsw_hz"),
        ({"dcr_ohm": -1e-3}, "dcr_ohm"),
        ({"rds_low_ohm": -1e-3}, "rds_low_ohm"),
        ({"rds_high_ohm": np.nan}, "rds_high_ohm"),
        ({"vout_v": 12.0}, "vout_v"),
        ({"vout_v": 0.0}, "vout_v"),
        ({"core_loss_w": np.inf}, "core_loss_w"),
        ({"rds_tc_per_k": np.nan}, "rds_tc_per_k"),
        ({"dead_time_s": -1e-9}, "dead_time_s"),
    ],
)
def test_invalid_parameters_name_the_field(change: dict[str, float], field: str) -> None:
    with pytest.raises(ValueError, match=field):
        params(**change)


def test_constructor_checks_shapes() -> None:
    p = params(2)
    with pytest.raises(ValueError, match="dcr_ohm"):
        PhaseLossParams.build(2, **(POINT | {"dcr_ohm": [1e-3, 1e-3, 1e-3]}))
    with pytest.raises(ValueError, match="uses_table"):
        PhaseLossParams(**{**vars(p), "uses_table": np.array([1, 0])})
    with pytest.raises(ValueError, match="n_phases"):
        PhaseLossParams.build(0, **POINT)
    with pytest.raises(ValueError, match="current_a"):
        phase_losses(p, np.nan, 25.0)
    with pytest.raises(ValueError, match="temp_c"):
        phase_losses(p, 1.0, np.inf)


def test_zero_dcr_is_allowed() -> None:
    loss = phase_losses(params(dcr_ohm=0.0), 30.0, 80.0)
    assert loss.inductor_copper_w[0] == 0.0


TABLE_A = [0.0, 10.0, 20.0, 30.0]
TABLE_W = [0.5, 1.0, 2.0, 3.5]
SHORT_A = [0.0, 40.0, np.nan, np.nan]  # a NaN-padded row
SHORT_W = [0.2, 4.2, np.nan, np.nan]


def table_params(**changes: Any) -> PhaseLossParams:
    base = POINT | {
        "table_current_a": [TABLE_A, SHORT_A],
        "table_loss_w": [TABLE_W, SHORT_W],
        "table_ref_c": 25.0,
        "table_tc_per_k": 0.003,
    }
    return PhaseLossParams.build(2, **(base | changes))


def test_table_interpolates_and_extrapolates_linearly() -> None:
    p = table_params()
    currents = np.array([[10.0, 40.0], [15.0, 20.0], [40.0, 60.0], [-25.0, 0.0]])
    loss = phase_losses(p, currents, 25.0)
    expected = np.array([[1.0, 4.2], [1.5, 2.2], [5.0, 6.2], [2.75, 0.2]])
    np.testing.assert_allclose(loss.stage_table_w, expected, rtol=1e-12)
    # the formula switch terms are replaced by the table, the inductor and core stay
    for name in ("high_side_w", "low_side_w", "switching_w", "gate_w", "dead_time_w"):
        assert np.all(getattr(loss, name) == 0.0), name
    assert np.all(loss.inductor_copper_w > 0.0)
    np.testing.assert_allclose(loss.core_w, 0.3)


def test_table_extrapolation_below_the_first_point_is_clipped_at_zero() -> None:
    p = table_params(
        table_current_a=[[10.0, 20.0, 30.0, np.nan], SHORT_A],
        table_loss_w=[[0.2, 1.2, 2.2, np.nan], SHORT_W],
    )
    loss = phase_losses(p, [[5.0, 0.0], [0.0, 0.0]], 25.0)
    np.testing.assert_allclose(loss.stage_table_w[:, 0], [0.0, 0.0], atol=1e-15)


def test_table_scales_with_its_temperature_coefficient() -> None:
    p = table_params()
    ratio = phase_losses(p, 20.0, 125.0).stage_table_w / phase_losses(p, 20.0, 25.0).stage_table_w
    np.testing.assert_allclose(ratio, 1.3, rtol=1e-12)


def test_mixed_table_and_formula_phases() -> None:
    p = table_params(uses_table=[True, False])
    loss = phase_losses(p, 20.0, 25.0)
    assert loss.stage_table_w[1] == 0.0
    assert loss.switching_w[1] == pytest.approx(0.6)
    assert loss.switching_w[0] == 0.0
    ignored = phase_losses(table_params(uses_table=False), 20.0, 25.0)
    assert np.all(ignored.stage_table_w == 0.0)
    assert np.all(ignored.switching_w == pytest.approx(0.6))


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"table_current_a": [[0.0, 10.0, 5.0, 30.0], SHORT_A]}, "increasing"),
        ({"table_current_a": [[0.0, np.nan, 5.0, 30.0], SHORT_A]}, "NaN only at the end"),
        ({"table_current_a": [[0.0, np.nan, np.nan, np.nan], SHORT_A]}, ">= 2 points"),
        ({"table_loss_w": [[0.5, 1.0, 2.0, np.nan], SHORT_W]}, "table_loss_w"),
        ({"table_loss_w": [[0.5, -1.0, 2.0, 3.0], SHORT_W]}, "table_loss_w"),
        ({"table_loss_w": [[0.5, np.inf, 2.0, 3.0], SHORT_W]}, "table_loss_w"),
    ],
)
def test_invalid_tables(change: dict[str, Any], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        table_params(**change)


def test_table_arguments_come_in_pairs() -> None:
    with pytest.raises(ValueError, match="together"):
        PhaseLossParams.build(1, **(POINT | {"table_current_a": TABLE_A}))


def test_breakdown_total_sums_every_term() -> None:
    loss = phase_losses(table_params(uses_table=[True, False]), [[12.0, 18.0]], 70.0)
    manual = sum(getattr(loss, name) for name in TERMS)
    np.testing.assert_allclose(loss.total_w, manual, rtol=1e-15)
    assert isinstance(loss, LossBreakdown)


currents = st.floats(min_value=-80.0, max_value=80.0)
temperatures = st.floats(min_value=-40.0, max_value=200.0)


@given(
    current=currents,
    temp=temperatures,
    tc=st.floats(min_value=0.0, max_value=0.01),
    table_tc=st.floats(min_value=-0.002, max_value=0.01),
)
def test_coefficients_reproduce_the_losses(
    current: float, temp: float, tc: float, table_tc: float
) -> None:
    p = table_params(uses_table=[True, False], rds_tc_per_k=tc, table_tc_per_k=table_tc)
    p0, slope = loss_coefficients(p, current)
    direct = phase_losses(p, current, temp).total_w
    np.testing.assert_allclose(p0 + slope * temp, direct, rtol=1e-11, atol=1e-12)


@given(a=currents, b=currents, temp=temperatures)
def test_loss_grows_with_current_magnitude(a: float, b: float, temp: float) -> None:
    lo, hi = sorted((abs(a), abs(b)))
    p = table_params(uses_table=[True, False])
    assert np.all(phase_losses(p, lo, temp).total_w <= phase_losses(p, hi, temp).total_w)
