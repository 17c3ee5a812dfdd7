"""Reference: pass-MOSFET stress during a short, checked by hand calculation.

Sources
-------
* JEDEC JESD51 series (thermal impedance Zth(t): junction rise per watt after a power step
  from thermal equilibrium). A single-stage Foster network R, tau has the closed form
  Zth(t) = R (1 - exp(-t / tau)), so a rectangular pulse P of length t raises the junction
  by P R (1 - exp(-t / tau)). Expected values below are hand calculations from it.
* Safe-operating-area charts in power-MOSFET datasheets are drawn on log-log axes with
  straight lines between the tabulated pulse durations (common practice); a straight line
  in log-log is a power law, so between (t1, I1) and (t2, I2) the allowed current at the
  geometric mean duration sqrt(t1 t2) is the geometric mean current sqrt(I1 I2). Hand
  calculations below.
"""

import math

import numpy as np
import pytest

from phaseward.physics.breaker import breaker_stress, longest_safe_delay_s, stress_curve
from phaseward.physics.thermal import FosterStages

# One stage, R = 0.5 K/W, tau = 10 ms; 12 V x 10 A = 120 W, so P R = 60 K.
ONE_STAGE = FosterStages(np.array([0.5]), np.array([0.01]))
WIDE_SOA = {"soa_time_s": [1e-4, 1.0], "soa_current_a": [1000.0, 900.0]}  # never binds here


@pytest.mark.parametrize(
    ("delay_s", "rise_k"),
    [
        (0.005, 23.60816),  # 60 x (1 - e^-0.5) = 60 x (1 - 0.6065307) = 60 x 0.3934693
        (0.010, 37.92723),  # 60 x (1 - e^-1)   = 60 x (1 - 0.3678794) = 60 x 0.6321206
        (0.030, 57.01278),  # 60 x (1 - e^-3)   = 60 x (1 - 0.0497871) = 60 x 0.9502129
    ],
)
def test_single_stage_rise_by_hand(delay_s: float, rise_k: float) -> None:
    r = breaker_stress(
        vin_v=12.0, current_limit_a=10.0, delay_s=delay_s, foster=ONE_STAGE, start_temp_c=40.0,
        junction_limit_c=175.0, **WIDE_SOA,
    )  # fmt: skip
    assert r.rise_k == pytest.approx(rise_k, abs=1e-5)
    assert r.peak_junction_c == pytest.approx(40.0 + rise_k, abs=1e-5)
    assert r.margin_k == pytest.approx(135.0 - rise_k, abs=1e-5)


def test_single_stage_longest_delay_by_hand() -> None:
    # Headroom 30 K = 60 K (1 - exp(-t / 10 ms))  ->  t = 10 ms x ln 2 = 6.931472 ms.
    d = longest_safe_delay_s(
        vin_v=12.0, current_limit_a=10.0, foster=ONE_STAGE, start_temp_c=120.0,
        junction_limit_c=150.0, **WIDE_SOA,
    )  # fmt: skip
    assert d * 1e3 == pytest.approx(6.931472, abs=1e-6)


SOA = {"soa_time_s": [1e-3, 1e-2], "soa_current_a": [40.0, 10.0]}


def test_soa_log_log_interpolation_by_hand() -> None:
    # Power law through (1 ms, 40 A) and (10 ms, 10 A): exponent ln(10/40) / ln 10 = -0.60206.
    #   at sqrt(1 x 10) ms = 3.162278 ms: sqrt(40 x 10) = 20 A (the geometric midpoint)
    #   at 2 ms: 40 x 2^-0.60206 = 40 x e^-0.417317 = 40 x 0.658813 = 26.3525 A
    curve = stress_curve(
        vin_v=1.0, current_limit_a=1.0, delay_s=[math.sqrt(10.0) * 1e-3, 2e-3],
        foster=ONE_STAGE, start_temp_c=25.0, junction_limit_c=150.0, **SOA,
    )  # fmt: skip
    np.testing.assert_allclose(curve.soa_allowed_a, [20.0, 26.3525], atol=5e-5)


def test_soa_bound_longest_delay_by_hand() -> None:
    # A 20 A limit meets the line at the geometric midpoint, sqrt(10) ms = 3.162278 ms;
    # 1 V x 20 A through 0.5 K/W rises at most 10 K, so the SOA binds.
    d = longest_safe_delay_s(
        vin_v=1.0, current_limit_a=20.0, foster=ONE_STAGE, start_temp_c=25.0,
        junction_limit_c=150.0, **SOA,
    )  # fmt: skip
    assert d * 1e3 == pytest.approx(3.162278, abs=1e-6)
