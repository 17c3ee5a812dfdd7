"""Reference: interleaved multiphase buck ripple cancellation.

Closed form for N phases evenly spaced by 360/N (from memory, in the form found in the
multiphase VRM literature): with m = floor(N D),
K(N, D) = N (D - m/N) ((m + 1)/N - D) / (D (1 - D)), the output ripple current over one
phase's ripple. It is checked here against the time-domain superposition of the phase
triangles (the textbook buck waveform of Erickson and Maksimovic, *Fundamentals of Power
Electronics*), against a brute-force numpy evaluation on a dense time grid, and against
hand-derived cases.
"""

import numpy as np
import numpy.typing as npt
import pytest

from phaseward.physics.ripple import (
    gapped_angles_deg,
    interleaved_ripple_pp_a,
    interleaved_ripple_ratio_even,
    respaced_angles_deg,
)

DUTIES = np.linspace(0.01, 0.99, 197)


def _ratio(duty: npt.ArrayLike, angles: npt.ArrayLike) -> npt.NDArray[np.float64]:
    # Vin = 1, Vout = D, L = 1, fsw = D (1 - D): single-phase ripple (1 - D) D / fsw = 1.
    d = np.asarray(duty, dtype=np.float64)
    return interleaved_ripple_pp_a(1.0, d, 1.0, d * (1.0 - d), angles)


@pytest.mark.parametrize("n_phases", range(1, 13))
def test_closed_form_matches_superposition(n_phases: int) -> None:
    angles = np.arange(n_phases) * 360.0 / n_phases
    np.testing.assert_allclose(
        _ratio(DUTIES, angles),
        interleaved_ripple_ratio_even(n_phases, DUTIES),
        rtol=1e-9,
        atol=1e-12,
    )


def test_hand_derived_cases() -> None:
    # N = 2, D = 0.25 (slopes +1/D = 4, -1/(1 - D) = -4/3 per unit ripple): on [0, 0.25)
    # one phase rises and one falls, net 8/3 x 0.25 = 2/3; then both fall. K = 2/3.
    assert _ratio(0.25, [0.0, 180.0]) == pytest.approx(2.0 / 3.0, rel=1e-12)
    assert interleaved_ripple_ratio_even(2, 0.25) == pytest.approx(2.0 / 3.0, rel=1e-12)
    # N = 4, D = 0.5: perfect cancellation.
    assert _ratio(0.5, [0.0, 90.0, 180.0, 270.0]) == pytest.approx(0.0, abs=1e-12)
    # 4 phases, phase 3 lost, D = 0.5: phases at 0 and 180 cancel exactly, the one at 90
    # is left alone -> K = 1. Re-spaced at 0/120/240: m = 1,
    # K = 3 (1/2 - 1/3)(2/3 - 1/2) / (1/4) = 1/3.
    assert _ratio(0.5, gapped_angles_deg(4, [3])) == pytest.approx(1.0, rel=1e-12)
    assert _ratio(0.5, respaced_angles_deg(4, [3])) == pytest.approx(1.0 / 3.0, rel=1e-12)
    # Same loss at D = 0.15: all three survivors fall together for 0.65 .. 1.0 of the
    # period, a drop of 3 x 0.35 / 0.85 = 21/17 -> the gap gives more ripple than one phase.
    assert _ratio(0.15, gapped_angles_deg(4, [3])) == pytest.approx(21.0 / 17.0, rel=1e-12)


def test_superposition_matches_dense_time_grid() -> None:
    rng = np.random.default_rng(60028)
    angles = rng.uniform(0.0, 360.0, size=(40, 5))
    angles[rng.random((40, 5)) < 0.3] = np.nan
    angles[:, 0] = rng.uniform(0.0, 360.0, size=40)  # keep one phase per case
    duty = rng.uniform(0.05, 0.95, size=40)
    tau = np.linspace(0.0, 1.0, 100_001)
    dense = np.empty(40)
    for case in range(40):  # a plain per-case evaluation, independent of the breakpoints
        u = np.mod(tau[None, :] - angles[case, :, None] / 360.0, 1.0)
        d = duty[case]
        dense[case] = np.ptp(np.nansum(np.where(u < d, u / d, (1.0 - u) / (1.0 - d)), axis=0))
    # Grid step 1e-5 with slopes below 5 / 0.05 = 100 per unit time: error below 1e-3.
    np.testing.assert_allclose(_ratio(duty, angles), dense, rtol=0.0, atol=1e-3)


@pytest.mark.parametrize("n_phases", range(2, 13))
def test_one_phase_lost_gap_versus_respaced(n_phases: int) -> None:
    for lost in range(n_phases):
        respaced = _ratio(DUTIES, respaced_angles_deg(n_phases, [lost]))
        gapped = _ratio(DUTIES, gapped_angles_deg(n_phases, [lost]))
        # Re-spaced survivors are an even (N - 1)-phase rail.
        np.testing.assert_allclose(
            respaced, interleaved_ripple_ratio_even(n_phases - 1, DUTIES), rtol=1e-9, atol=1e-12
        )
        # Which phase is lost does not matter (rotational symmetry of the even rail).
        np.testing.assert_allclose(
            gapped, _ratio(DUTIES, gapped_angles_deg(n_phases, [0])), rtol=1e-9, atol=1e-12
        )
        # On this grid, leaving the gap never cancels better than re-spacing.
        assert np.all(gapped >= respaced - 1e-12)


def test_batch_with_nan_equals_per_case_calls() -> None:
    # The whole N-1 screen of a 6-phase rail in one call: row k has phase k absent.
    full = np.arange(6) * 60.0
    batch = np.tile(full, (6, 1))
    batch[np.arange(6), np.arange(6)] = np.nan
    one_call = _ratio(0.3, batch)
    each = [float(_ratio(0.3, gapped_angles_deg(6, [k]))) for k in range(6)]
    np.testing.assert_allclose(one_call, each, rtol=1e-12)
