"""Reference: JEDEC JESD51-14 (Foster and Cauer thermal models, Zth(t) as the step response)
checked with scipy and numpy as reference implementations.

* The Cauer ladder's impedance Z(s) = 1 / (s C_1 + 1 / (R_1 + 1 / (s C_2 + ...))) is built as
  a rational function with numpy polynomials; ``scipy.signal.residue`` gives its partial
  fractions r_i / (s - p_i), i.e. the Foster stages tau_i = -1/p_i, R_i = r_i tau_i, and
  ``scipy.signal.step`` gives Zth(t).
* Foster to Cauer is checked against the textbook continued-fraction (Cauer I) expansion of
  Y(s) = 1/Z(s) by polynomial division, for up to three well-separated stages where that
  route is still well conditioned.
* The coupled network's steady state is checked against ``np.linalg.solve`` of a conductance
  matrix written out by hand, and one exact step against ``scipy.linalg.expm``.
"""

import numpy as np
import pytest
from numpy.polynomial import polynomial as P
from scipy import linalg, signal

from phaseward.physics.thermal import (
    CauerStages,
    FosterStages,
    ThermalNetwork,
    build_coupled_network,
    cauer_to_foster,
    foster_to_cauer,
    simulate_c,
    steady_state_c,
)

LADDERS = [
    CauerStages(np.array([2.0]), np.array([0.5])),
    CauerStages(np.array([0.4, 2.5]), np.array([0.02, 1.5])),
    CauerStages(np.array([0.2, 0.9, 3.0]), np.array([0.004, 0.3, 20.0])),
    CauerStages(np.array([0.1, 0.5, 1.5, 4.0]), np.array([0.001, 0.05, 2.0, 100.0])),
]


def ladder_impedance(cauer: CauerStages) -> tuple[np.ndarray, np.ndarray]:
    """(num, den) of Z(s), coefficients in ascending powers of s."""
    num: np.ndarray = np.zeros(1)
    den: np.ndarray = np.ones(1)
    for r, c in zip(cauer.r_k_per_w[::-1], cauer.c_j_per_k[::-1], strict=True):
        series = P.polyadd(r * den, num)  # R + Z_next = (R D + N) / D
        num, den = series, P.polyadd(P.polymulx(c * series), den)
    return num, den


@pytest.mark.parametrize("cauer", LADDERS)
def test_cauer_to_foster_matches_partial_fractions(cauer: CauerStages) -> None:
    num, den = ladder_impedance(cauer)
    residues, poles, direct = signal.residue(num[::-1], den[::-1])
    assert direct.size == 0 or np.allclose(direct, 0.0)
    tau = -1.0 / poles.real
    order = np.argsort(tau)
    foster = cauer_to_foster(cauer)
    np.testing.assert_allclose(foster.tau_s, tau[order], rtol=1e-9)
    np.testing.assert_allclose(foster.r_k_per_w, (residues.real * tau)[order], rtol=1e-7)


@pytest.mark.parametrize("cauer", LADDERS)
def test_zth_is_the_step_response(cauer: CauerStages) -> None:
    num, den = ladder_impedance(cauer)
    foster = cauer_to_foster(cauer)
    for end in (10.0 * cauer.c_j_per_k[0] * cauer.r_k_per_w[0], 5.0 * foster.tau_s.max()):
        t = np.linspace(0.0, end, 2001)  # signal.step needs equal spacing
        _, response = signal.step((num[::-1], den[::-1]), T=t)
        np.testing.assert_allclose(cauer.zth_k_per_w(t), response, rtol=1e-7, atol=1e-9)
        np.testing.assert_allclose(foster.zth_k_per_w(t), response, rtol=1e-7, atol=1e-9)


def continued_fraction(foster: FosterStages) -> CauerStages:
    """Cauer I expansion of Y(s) = 1/Z(s) by repeated polynomial division (ascending coeffs)."""
    num, den = np.zeros(1), np.ones(1)
    for r, tau in zip(foster.r_k_per_w, foster.tau_s, strict=True):
        num, den = P.polyadd(P.polymul(num, [1.0, tau]), r * den), P.polymul(den, [1.0, tau])
    y_num, y_den = den, num  # Y = den / num, deg y_num = deg y_den + 1
    r_out, c_out = [], []
    while y_den.size:
        c = y_num[-1] / y_den[-1]
        rest = (y_num - np.concatenate([[0.0], c * y_den]))[:-1]  # Y - s C, top term cancels
        r = y_den[-1] / rest[-1]  # Z' = y_den / rest, equal degrees
        rest2 = (y_den - r * rest)[:-1]  # Z' - R, top term cancels
        c_out.append(c)
        r_out.append(r)
        y_num, y_den = rest, rest2
    return CauerStages(np.array(r_out), np.array(c_out))


@pytest.mark.parametrize(
    ("r", "tau"),
    [
        ([1.0], [0.5]),
        ([0.5, 1.5], [0.01, 1.0]),
        ([0.3, 1.0, 2.0], [0.005, 0.2, 10.0]),
    ],
)
def test_foster_to_cauer_matches_the_continued_fraction(r: list[float], tau: list[float]) -> None:
    foster = FosterStages(np.array(r), np.array(tau))
    expected = continued_fraction(foster)
    cauer = foster_to_cauer(foster)
    np.testing.assert_allclose(cauer.r_k_per_w, expected.r_k_per_w, rtol=1e-8)
    np.testing.assert_allclose(cauer.c_j_per_k, expected.c_j_per_k, rtol=1e-8)


def hand_network() -> tuple[np.ndarray, np.ndarray]:
    """Phase A: one stage (2 K/W, 0.1 J/K); phase B: 1 K/W, 0.05 J/K then 3 K/W, 2 J/K;
    board 10 J/K, 0.5 K/W to ambient. Nodes: A_j, B_j, B_2, board."""
    a = np.array(
        [
            [1 / 2, 0.0, 0.0, -1 / 2],
            [0.0, 1.0, -1.0, 0.0],
            [0.0, -1.0, 1.0 + 1 / 3, -1 / 3],
            [-1 / 2, 0.0, -1 / 3, 1 / 2 + 1 / 3 + 2.0],
        ]
    )
    return a, np.array([0.1, 0.05, 2.0, 10.0])


def built_network() -> ThermalNetwork:
    return build_coupled_network(
        [
            CauerStages(np.array([2.0]), np.array([0.1])),
            CauerStages(np.array([1.0, 3.0]), np.array([0.05, 2.0])),
        ],
        board_to_ambient_k_per_w=0.5,
        board_c_j_per_k=10.0,
    )


def test_network_matrix_matches_the_hand_written_one() -> None:
    net = built_network()
    a, c = hand_network()
    np.testing.assert_allclose(
        net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k), a, rtol=1e-15
    )
    np.testing.assert_allclose(net.capacitance_j_per_k, c, rtol=1e-15)


def test_steady_state_matches_linalg_solve() -> None:
    a, _ = hand_network()
    p0, slope, ambient = np.array([3.0, 5.0]), np.array([0.02, 0.05]), 40.0
    system = a.copy()
    system[0, 0] -= slope[0]
    system[1, 1] -= slope[1]
    expected = np.linalg.solve(system, np.array([p0[0], p0[1], 0.0, 2.0 * ambient]))
    np.testing.assert_allclose(steady_state_c(built_network(), p0, slope, ambient), expected)


def test_one_exact_step_matches_the_matrix_exponential() -> None:
    a, c = hand_network()
    p0, ambient, dt = np.array([3.0, 5.0]), 40.0, 0.7
    start = np.array([80.0, 60.0, 50.0, 45.0])
    f = np.array([p0[0], p0[1], 0.0, 2.0 * ambient])
    settled = np.linalg.solve(a, f)
    # C dT/dt = f - A T with f constant: T(dt) = T_ss + expm(-C^-1 A dt) (T(0) - T_ss)
    expected = settled + linalg.expm(-(a / c[:, None]) * dt) @ (start - settled)
    temps = simulate_c(built_network(), start, dt, p0[None, :], np.zeros((1, 2)), ambient)
    np.testing.assert_allclose(temps[1], expected, rtol=1e-12)
