"""Reference: Erickson and Maksimovic, *Fundamentals of Power Electronics*, chapter 2 (buck
converter in CCM): in steady state the switch conducts for D = V/Vg of each period, the
inductor current is a triangle of peak-to-peak ripple dI = (Vg - V) D / (L fsw) (the book's
peak deviation Delta i = (Vg - V) D Ts / (2 L) doubled; from memory), and its average equals
the DC current the phase delivers.

Checks the switching-level simulator used to invent fault captures (tests/buck_sim.py) on the
same hand-worked example as test_ref_buck_ripple.py: Vg = 12 V, V = 1.8 V, L = 1 uH,
fsw = 300 kHz, I = 20 A -> D = 0.15, dI = 5.1 A peak-to-peak.
"""

import numpy as np
import pytest
from tests.buck_sim import BuckCase, simulate

WORKED = BuckCase(
    vin_v=12.0, vout_v=1.8, inductance_h=1.0e-6, fsw_hz=300e3, phase_current_a=20.0,
    r_source_ohm=1e-6, sample_hz=100e6, fault="no_fault",
)  # fmt: skip
PERIOD_S = 1.0 / 300e3


@pytest.fixture(scope="module")
def steady() -> tuple[np.ndarray, np.ndarray]:
    capture = simulate(WORKED)
    window = (capture.t_s >= -30e-6) & (capture.t_s < -30e-6 + 9 * PERIOD_S)  # whole periods
    return capture.current_a[window, 0], capture.switch_v[window, 0]


def test_ripple_matches_the_textbook(steady: tuple[np.ndarray, np.ndarray]) -> None:
    current, _ = steady
    # 5.1 A by hand; the simulator turns the switch off at the first step past the peak
    # command, so it may overshoot by one step of the rising slope (10.2 A/us x 5 ns).
    assert current.max() - current.min() == pytest.approx(5.1, abs=0.06)


def test_average_current_is_the_phase_share(steady: tuple[np.ndarray, np.ndarray]) -> None:
    current, _ = steady
    assert current.mean() == pytest.approx(20.0, rel=0.01)


def test_duty_cycle_is_vout_over_vin(steady: tuple[np.ndarray, np.ndarray]) -> None:
    _, node = steady
    assert np.mean(node > 6.0) == pytest.approx(0.15, abs=0.003)
