"""Reference: Incropera, DeWitt, Bergman and Lavine, *Fundamentals of Heat and Mass Transfer*,
Example 5.1 (lumped capacitance: thermocouple junction in a gas stream).

Data of the example (from memory): h = 400 W/m^2K, k = 20 W/mK, c = 400 J/kgK,
rho = 8500 kg/m^3; a spherical junction with time constant 1 s has D = 0.706 mm
(Bi = h (D/6) / k = 2.35e-3 << 0.1, so the lumped model holds); from 25 degC in a 200 degC
gas stream it reaches 199 degC after about 5.2 s (t = tau ln(175/1) = 5.16 s). The junction
is reproduced here as a single-node network, R = 1/(hA), C = rho V c, driven only by the
ambient (no power).
"""

import numpy as np
import pytest

from phaseward.physics.thermal import (
    CauerStages,
    ThermalNetwork,
    simulate_c,
    time_to_limit_s,
)

H_W_PER_M2K = 400.0
K_W_PER_MK = 20.0
C_J_PER_KGK = 400.0
RHO_KG_PER_M3 = 8500.0
TAU_S = 1.0
# sphere: V / A = D / 6, so tau = rho c D / (6 h)
DIAMETER_M = 6.0 * H_W_PER_M2K * TAU_S / (RHO_KG_PER_M3 * C_J_PER_KGK)
AREA_M2 = np.pi * DIAMETER_M**2
VOLUME_M3 = np.pi * DIAMETER_M**3 / 6.0


def junction() -> ThermalNetwork:
    return ThermalNetwork(
        conductance_w_per_k=np.zeros((1, 1)),
        capacitance_j_per_k=np.array([RHO_KG_PER_M3 * VOLUME_M3 * C_J_PER_KGK]),
        ambient_conductance_w_per_k=np.array([H_W_PER_M2K * AREA_M2]),
        junction_node=np.array([0]),
        board_node=0,
    )


def test_diameter_and_biot_number() -> None:
    diameter_mm = DIAMETER_M * 1e3
    assert diameter_mm == pytest.approx(0.706, abs=5e-4)  # book: 0.706 mm
    biot = H_W_PER_M2K * (VOLUME_M3 / AREA_M2) / K_W_PER_MK
    assert biot == pytest.approx(2.35e-3, rel=5e-3)
    assert biot < 0.1  # the lumped-capacitance criterion
    net = junction()
    tau = net.capacitance_j_per_k[0] / net.ambient_conductance_w_per_k[0]
    assert tau == pytest.approx(TAU_S, rel=1e-12)


def test_time_to_reach_199_degc() -> None:
    hit = time_to_limit_s(junction(), [25.0], [0.0], [0.0], 200.0, [199.0])
    assert hit.time_s == pytest.approx(TAU_S * np.log(175.0), rel=1e-10)  # 5.165 s
    assert round(hit.time_s, 1) == 5.2  # the book's rounded answer
    assert (hit.phase, hit.runaway) == (0, False)


def test_heating_curve_matches_the_lumped_solution() -> None:
    dt, n = 0.01, 1000
    temps = simulate_c(junction(), [25.0], dt, np.zeros((n, 1)), np.zeros((n, 1)), 200.0)
    t = np.arange(n + 1) * dt
    np.testing.assert_allclose(temps[:, 0], 200.0 - 175.0 * np.exp(-t / TAU_S), rtol=1e-12)
    assert temps[round(5.2 / dt), 0] == pytest.approx(199.04, abs=0.01)


def test_single_cauer_stage_has_the_same_time_constant() -> None:
    net = junction()
    stage = CauerStages(1.0 / net.ambient_conductance_w_per_k, np.array(net.capacitance_j_per_k))
    r = 1.0 / net.ambient_conductance_w_per_k[0]
    assert stage.zth_k_per_w(TAU_S) == pytest.approx(r * (1.0 - np.exp(-1.0)), rel=1e-12)
