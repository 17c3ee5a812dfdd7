"""Reference: Erickson and Maksimovic, *Fundamentals of Power Electronics* (buck converter
in CCM, chapter 2: D = V/Vg, inductor ripple from volt-second balance, output capacitor
ripple from the charge of the AC inductor current), with numpy/scipy numerical
integration as the reference implementation for RMS values and waveform integrals.

The book writes ripples as peak deviations, Delta i = (Vg - V) D Ts / (2 L) and
Delta v = Delta i Ts / (8 C) (from memory); phaseward reports peak-to-peak values, twice
those: dI = (Vg - V) D / (L fsw) and dV = dI / (8 fsw C).
"""

import numpy as np
import pytest
from scipy.integrate import cumulative_trapezoid

from phaseward.physics.ripple import (
    duty_cycle,
    inductor_ripple_pp_a,
    output_ripple_voltage_pp_from_waveform_v,
    output_ripple_voltage_pp_v,
    rms_current_a,
)

# Worked example, hand calculation per the textbook formulas:
#   Vin = 12 V, Vout = 1.8 V, L = 1 uH, fsw = 300 kHz, I = 20 A, C = 100 uF
#   D  = 1.8 / 12 = 0.15
#   dI = (12 - 1.8) x 0.15 / (1e-6 x 300e3) = 1.53 / 0.3 = 5.1 A peak-to-peak
#        (book's peak deviation Delta i = 2.55 A)
#   I_rms = sqrt(20^2 + 5.1^2 / 12) = sqrt(400 + 2.1675) = sqrt(402.1675) = 20.05411 A
#   dV (ESR = 0) = 5.1 / (8 x 300e3 x 100e-6) = 5.1 / 240 = 21.25 mV peak-to-peak
VIN, VOUT, L_H, FSW, I_DC, C_F = 12.0, 1.8, 1.0e-6, 300e3, 20.0, 100e-6


def test_worked_example() -> None:
    assert duty_cycle(VIN, VOUT) == pytest.approx(0.15, rel=1e-12)
    ripple = inductor_ripple_pp_a(VIN, VOUT, L_H, FSW)
    assert ripple == pytest.approx(5.1, rel=1e-12)
    assert rms_current_a(I_DC, ripple) == pytest.approx(20.05411, abs=1e-5)
    assert output_ripple_voltage_pp_v(ripple, C_F, 0.0, FSW) == pytest.approx(21.25e-3, rel=1e-12)
    exact = output_ripple_voltage_pp_from_waveform_v(
        VIN, VOUT, L_H, FSW, [0.0], capacitance_f=C_F, esr_ohm=0.0
    )
    assert exact == pytest.approx(21.25e-3, rel=1e-9)


def _phase_currents(
    t_s: np.ndarray, duty: float, fsw_hz: float, ripple_a: float, angles_deg: list[float]
) -> np.ndarray:
    """Sum of triangle currents (min 0, peak ``ripple_a``) sampled on ``t_s``."""
    total = np.zeros_like(t_s)
    for angle in angles_deg:
        u = np.mod(t_s * fsw_hz - angle / 360.0, 1.0)
        total += ripple_a * np.where(u < duty, u / duty, (1.0 - u) / (1.0 - duty))
    return total


@pytest.mark.parametrize(("i_dc", "duty"), [(20.0, 0.15), (0.0, 0.5), (-5.0, 0.8), (1.0, 0.05)])
def test_rms_of_triangle_on_dc_matches_numerical_integration(i_dc: float, duty: float) -> None:
    ripple, fsw = 5.1, 300e3
    t = np.linspace(0.0, 1.0 / fsw, 400_001)
    current = i_dc - ripple / 2 + _phase_currents(t, duty, fsw, ripple, [0.0])
    rms_numeric = np.sqrt(np.trapezoid(current**2, t) * fsw)
    assert rms_current_a(i_dc, ripple) == pytest.approx(rms_numeric, rel=1e-6, abs=1e-6)


@pytest.mark.parametrize(
    "angles",
    [[0.0], [0.0, 180.0], [0.0, 90.0, 180.0], [0.0, 40.0, 200.0, 300.0], [10.0, 10.0, 250.0]],
)
@pytest.mark.parametrize("esr_ohm", [0.0, 0.3e-3, 3e-3])
def test_exact_ripple_voltage_matches_numerical_integration(
    angles: list[float], esr_ohm: float
) -> None:
    # v = (1/C) int(i_c dt) + ESR i_c with i_c the AC part of the summed phase current,
    # integrated numerically on a dense grid with scipy.
    t = np.linspace(0.0, 1.0 / FSW, 400_001)
    ripple = float(inductor_ripple_pp_a(VIN, VOUT, L_H, FSW))
    current = _phase_currents(t, VOUT / VIN, FSW, ripple, angles)
    i_c = current - np.trapezoid(current, t) * FSW
    v = cumulative_trapezoid(i_c, t, initial=0.0) / C_F + esr_ohm * i_c
    exact = output_ripple_voltage_pp_from_waveform_v(
        VIN, VOUT, L_H, FSW, angles, capacitance_f=C_F, esr_ohm=esr_ohm
    )
    assert exact == pytest.approx(np.ptp(v), rel=1e-4)
