"""Phase losses against numerical integration of the switching waveforms.

Reference: numpy numerical integration (np.trapezoid over a finely sampled switching period)
of the ideal CCM buck waveforms of Erickson and Maksimovic, *Fundamentals of Power
Electronics*, chapter 2 (inductor current a triangle on its DC level; high-side switch
conducting for D Ts, low-side for (1 - D) Ts) and of the linear voltage/current transition
model behind the switching-loss term 0.5 Vin I (tr + tf) fsw (textbook hard-switching
estimate, common practice). Every loss is the period average of the instantaneous power.
"""

import numpy as np
import pytest

from phaseward.physics.losses import PhaseLossParams, phase_losses

VIN, VOUT, FSW, L, I_DC = 12.0, 1.0, 500e3, 220e-9, 22.0
R_HS, R_LS, DCR = 5e-3, 1.5e-3, 0.3e-3
TR, TF = 6e-9, 4e-9
TEMP = 25.0  # the reference temperature of every resistance: no temperature scaling


@pytest.fixture(scope="module")
def period() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Time, inductor current and high-side on-indicator over one period, finely sampled."""
    ts, d = 1.0 / FSW, VOUT / VIN
    t = np.linspace(0.0, ts, 2_000_001)
    ripple = (VIN - VOUT) * d / (L * FSW)
    rising = t < d * ts
    i = np.where(
        rising,
        I_DC - ripple / 2 + ripple * t / (d * ts),
        I_DC + ripple / 2 - ripple * (t - d * ts) / ((1 - d) * ts),
    )
    return t, i, rising


def params(**changes: float) -> PhaseLossParams:
    values = {"vin_v": VIN, "vout_v": VOUT, "fsw_hz": FSW, "inductance_h": L, "dcr_ohm": DCR,
              "dcr_ref_c": TEMP, "rds_high_ohm": R_HS, "rds_low_ohm": R_LS, "rds_ref_c": TEMP,
              "rds_tc_per_k": 0.004} | changes  # fmt: skip
    return PhaseLossParams.build(1, **values)


def average(t: np.ndarray, power: np.ndarray) -> float:
    return float(np.trapezoid(power, t) / (t[-1] - t[0]))


def test_conduction_losses_are_period_averages(
    period: tuple[np.ndarray, np.ndarray, np.ndarray],
) -> None:
    t, i, on = period
    loss = phase_losses(params(), I_DC, TEMP)
    assert float(loss.high_side_w[0]) == pytest.approx(
        average(t, np.where(on, i**2 * R_HS, 0)), rel=1e-5
    )
    assert float(loss.low_side_w[0]) == pytest.approx(
        average(t, np.where(on, 0, i**2 * R_LS)), rel=1e-5
    )
    assert float(loss.inductor_copper_w[0]) == pytest.approx(average(t, i**2 * DCR), rel=1e-6)


def test_switching_loss_is_the_overlap_integral() -> None:
    """Hard switching of an inductive (clamped) load: at turn-on the current rises to I at
    full voltage, then the voltage falls at full current (turn-off the reverse); each ramp
    takes half the transition time. The overlap integral of v i is 0.5 Vin I t per
    transition, the textbook term 0.5 Vin I (tr + tf) fsw. Integrate the waveform."""

    def transition_energy(duration: float) -> float:
        s = np.linspace(0.0, 1.0, 200_001)
        t = s * duration
        # Inductive clamp: the current rises to I during the first half at full voltage, the
        # voltage falls during the second half at full current.
        i = np.where(s < 0.5, 2 * s * I_DC, I_DC)
        v = np.where(s < 0.5, VIN, VIN * (2 - 2 * s))
        return float(np.trapezoid(v * i, t))

    expected = (transition_energy(TR) + transition_energy(TF)) * FSW
    loss = phase_losses(params(rise_time_s=TR, fall_time_s=TF), I_DC, TEMP)
    assert float(loss.switching_w[0]) == pytest.approx(expected, rel=1e-6)


def test_resistances_scale_with_temperature() -> None:
    """From 25 to 85 degC the switches' loss grows by 1 + 0.004 x 60 = 1.24 (their linear
    tempco) and the copper's by (1 + a x 65) / (1 + a x 5), the IEC 60028 law referenced to
    20 degC with a = 0.00393 /K, since the DCR is given at 25 degC."""
    cold = phase_losses(params(), I_DC, TEMP)
    hot = phase_losses(params(), I_DC, 85.0)
    assert float(hot.high_side_w[0] / cold.high_side_w[0]) == pytest.approx(1.24, rel=1e-12)
    copper = (1 + 0.00393 * 65) / (1 + 0.00393 * 5)
    assert float(hot.inductor_copper_w[0] / cold.inductor_copper_w[0]) == pytest.approx(
        copper, rel=1e-12
    )
