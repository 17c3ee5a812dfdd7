"""Unit tests for phaseward.physics.drift (Page's CUSUM on the estimator's innovations)."""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
from hypothesis import given, settings
from hypothesis import strategies as st
from tests.drift_sim import simulate, watch

from phaseward.physics.drift import (
    DriftCarry,
    DriftRun,
    InnovationScale,
    drift_watch,
    extra_resistance,
)

F64 = npt.NDArray[np.float64]
SCALE = InnovationScale(np.full(3, 0.6), np.full(3, 0.35), np.full(3, 0.3))


def invented(n: int, seed: int) -> tuple[F64, F64]:
    """Normalised innovations of three phases with a shift on phase 0 in the middle third
    and some readings missing; the losses they came with."""
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((n, 3))
    z[n // 3 : 2 * n // 3, 0] += 1.5
    z[rng.random((n, 3)) < 0.1] = np.nan
    return z, rng.uniform(1.0, 3.0, (n, 3))


def run_in_pieces(z: F64, power: F64, cuts: list[int]) -> tuple[DriftRun, list[DriftRun]]:
    t_s = np.arange(z.shape[0], dtype=np.float64)
    opts = {"reference": 0.25, "threshold": 20.0}
    whole = drift_watch(z, SCALE, power, t_s, DriftCarry.fresh(4), **opts)
    carry, parts = DriftCarry.fresh(4), []
    for lo, hi in zip([0, *cuts], [*cuts, z.shape[0]], strict=True):
        part = drift_watch(z[lo:hi], SCALE, power[lo:hi], t_s[lo:hi], carry, **opts)
        parts.append(part)
        carry = part.carry
    return whole, parts


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 1000),
    cuts=st.lists(st.integers(1, 599), max_size=12, unique=True).map(sorted),
)
def test_events_do_not_depend_on_the_cut(seed: int, cuts: list[int]) -> None:
    """The same changes at the same samples, the same statistic bit for bit, and the same
    window (to rounding) however the sequence is split into calls."""
    z, power = invented(600, seed)
    whole, parts = run_in_pieces(z, power, cuts)
    offsets = [0, *cuts]
    assert whole.changes == [(k + lo, c, on) for p, lo in zip(parts, offsets, strict=True)
                             for k, c, on in p.changes]  # fmt: skip
    np.testing.assert_array_equal(whole.statistic, np.vstack([p.statistic for p in parts]))
    np.testing.assert_array_equal(whole.raised, np.vstack([p.raised for p in parts]))
    joined = np.concatenate([p.window for p in parts], axis=1)
    np.testing.assert_allclose(whole.window, joined, rtol=1e-9, atol=1e-9)
    np.testing.assert_array_equal(whole.start_t_s, np.vstack([p.start_t_s for p in parts]))
    joined = np.concatenate([p.recent for p in parts], axis=1)
    np.testing.assert_allclose(whole.recent, joined, rtol=1e-9, atol=1e-9)


def test_shift_raises_then_clears_on_its_phase_only() -> None:
    z, power = invented(600, 1)
    whole, _ = run_in_pieces(z, power, [])
    assert [(c, on) for _, c, on in whole.changes] == [(0, True), (0, False)]
    raised_at, cleared_at = (k for k, _, _ in whole.changes)
    assert 200 <= raised_at < 240
    assert 400 <= cleared_at < 520
    # At the raise the window starts where the statistic last stood at zero: near the shift.
    assert 180 <= whole.start_t_s[raised_at, 0] <= 205


def test_board_channel_leaves_out_a_drifting_phase() -> None:
    """All phases shifted alike is the board's; one phase shifted is that phase's alone."""
    rng = np.random.default_rng(4)
    z = rng.standard_normal((400, 3))
    z[100:] += 0.8
    power = np.full((400, 3), 2.0)
    run = drift_watch(z, SCALE, power, np.arange(400.0), DriftCarry.fresh(4),
                      reference=0.25, threshold=8.0)  # fmt: skip
    assert [c for _, c, _ in run.changes] == [3]


def test_extra_resistance_needs_two_samples_and_power() -> None:
    r, se = extra_resistance(np.array([[1.0, 3.0], [2.0, 6.0], [4.0, 14.0], [0.0, 6.0]]))
    assert np.isnan(r[0])
    assert np.isnan(se[0])
    assert r[1] == 1.0
    assert se[1] > 0


def test_healthy_week_at_one_sample_per_second_raises_nothing() -> None:
    """Seven simulated days at 1 Hz on the default setting (k 0.25, h 35), the load stepping
    every 20 minutes, filtered and tested a day per call: no drift event."""
    rng = np.random.default_rng(2027)
    n = 7 * 86400
    power = np.repeat(rng.uniform(1.0, 3.5, (n // 1200, 4)), 1200, axis=0)
    _, readings = simulate(power, 1.0, 25.0, rng, chunk=86400)
    result = watch(power, readings, 1.0, 25.0, reference=0.25, threshold=35.0, pieces=7)
    assert result.run.changes == []
    assert float(result.run.statistic.max()) < 35.0
