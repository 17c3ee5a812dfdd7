"""Reference: IEC 60028, International standard of resistance for copper.

Annealed copper at 20 degC: resistivity 1/58 ohm mm^2/m (= 0.017241 ohm mm^2/m) and
temperature coefficient alpha20 = 0.00393 /K, R(T) = R20 (1 + alpha20 (T - 20)).
Expected values below are hand calculations from those two numbers.
"""

import numpy as np
import pytest

from phaseward.physics.constants import ALPHA_CU_20, RHO_CU_20
from phaseward.physics.sensing import (
    copper_resistance_ohm,
    dcr_sense_to_current_a,
    uncompensated_reading_error,
)


def test_standard_constants() -> None:
    assert ALPHA_CU_20 == 0.00393
    rho_ohm_mm2_per_m = RHO_CU_20 * 1e6
    assert rho_ohm_mm2_per_m == pytest.approx(0.017241, abs=5e-7)


# R20 of 1 m of 1 mm^2 annealed copper = 1/58 ohm = 0.0172414 ohm.
#   0 degC:  x (1 - 0.00393*20) = x 0.92140 -> 0.0158862 ohm
#  75 degC:  x (1 + 0.00393*55) = x 1.21615 -> 0.0209681 ohm
# 100 degC:  x (1 + 0.00393*80) = x 1.31440 -> 0.0226621 ohm
@pytest.mark.parametrize(
    ("temp_c", "expected_ohm"),
    [(0.0, 0.0158862), (20.0, 0.0172414), (75.0, 0.0209681), (100.0, 0.0226621)],
)
def test_one_metre_one_square_millimetre(temp_c: float, expected_ohm: float) -> None:
    r20_ohm = RHO_CU_20 * 1.0 / 1.0e-6  # rho L / A with L = 1 m, A = 1 mm^2
    assert copper_resistance_ohm(r20_ohm, temp_c) == pytest.approx(expected_ohm, abs=1e-7)


def test_reference_measured_away_from_20_c() -> None:
    # A 0.25 mohm DCR measured at 25 degC; at 105 degC:
    # 0.25 (1 + 0.00393*85) / (1 + 0.00393*5) = 0.25 x 1.33405 / 1.01965 = 0.327085 mohm
    r = copper_resistance_ohm(0.25e-3, 105.0, ref_temp_c=25.0)
    assert r * 1e3 == pytest.approx(0.327085, abs=1e-6)


def test_compensated_sensing_gives_the_true_current_at_temperature() -> None:
    # 30 A through a 0.2 mohm (at 20 degC) winding at 80 degC:
    # DCR = 0.2 x (1 + 0.00393*60) = 0.24716 mohm, V = 30 x 0.24716e-3 = 7.4148 mV.
    temp_c = 80.0
    sense_v = 7.4148e-3
    assert dcr_sense_to_current_a(sense_v, 0.2e-3, temp_c) == pytest.approx(30.0, rel=1e-9)
    # A sensor that assumes 0.2 mohm reads 7.4148 / 0.2 = 37.074 A: 23.58 % high.
    assert uncompensated_reading_error(temp_c) == pytest.approx(0.2358, abs=1e-9)


def test_uncompensated_sensor_over_reads_about_0_39_percent_per_kelvin() -> None:
    temps_c = np.arange(20.0, 121.0, 10.0)
    per_kelvin = np.diff(uncompensated_reading_error(temps_c)) / 10.0
    np.testing.assert_allclose(per_kelvin, 0.00393, rtol=1e-12)
    # Referenced to 25 degC the slope is alpha / (1 + 5 alpha) = 0.003854 /K.
    slope_25 = np.diff(uncompensated_reading_error([25.0, 26.0], ref_temp_c=25.0))[0]
    assert slope_25 == pytest.approx(0.00393 / 1.01965, rel=1e-12)
