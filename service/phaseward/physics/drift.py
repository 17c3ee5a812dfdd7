"""Cooling drift: a sequential test on the junction estimator's normalised innovations.

A fan wearing out or a thermal interface drying raises a thermal resistance slowly; the
readings then run persistently hotter than the Kalman filter predicts
(:mod:`~phaseward.physics.estimator`), long before any limit is near. This module watches the
normalised innovations z (N(0, 1) and white while the model holds) of each phase, and of the
shared board path, with a one-sided tabular CUSUM (E. S. Page, "Continuous inspection
schemes", Biometrika 41, 1954; D. C. Montgomery, *Introduction to Statistical Quality
Control*, ch. 9.1, tabular CUSUM with reference value k and decision interval h, from memory):

    S_n = max(0, S_{n-1} + z_n - k)     raised when S_n > h,

the upper CUSUM for a shift of the mean from 0 to 2k (k in units of the innovation std). Once
raised, the mirrored test C_n = max(0, C_{n-1} + k - z_n) watches for the mean to fall back to
0 and clears the episode when C_n > h: the same decision interval both ways, so an episode
neither opens nor closes on the noise alone more often than the chosen in-control run length.

The recursion is sequential; it is evaluated in one pass by its closed form (Lindley's
recursion: with the partial sums C_n = S_0 + sum_{i<=n} x_i, S_n = C_n - min(0, min_{j<=n}
C_j)), so no Python loop runs per sample: only one turn per raise or clear.

Missing readings (NaN) add nothing: the statistic holds. A phase's channel is its innovation
against the other phases', the board's the sum over the phases not in an episode of their own
(:func:`channels`), so a drift is named where it is.

Estimate of the extra thermal resistance
----------------------------------------
The filter absorbs part of a persistent error into its state: in steady state a constant
excess b (K) of the sensed temperatures leaves the innovation e = G b with

    G = I - H (I - F (I - K H))^-1 F K

(from the fixed point of the filter's prediction x-_{n+1} = F (x-_n + K (y - H x-_n)) + u;
F, K, H, S of the steady-state filter, S = H P- H^T + R, P- from the discrete algebraic Riccati
equation, scipy.linalg.solve_discrete_are). An extra resistance dR on a phase's path to the
board raises its junction, and its sensor, by P dR in steady state (P the phase's loss); on the
board's path to ambient it raises every junction by P_total dR. So each sample gives a
bias-equivalent excess u = e / G_pp = z sqrt(S_pp) / G_pp (for the board, the sum of the
phases' e over the sum of their G 1), and over the window since the CUSUM last stood at zero
(Montgomery's estimate of when the shift began) dR = sum u / sum P, with the standard error of
the mean of u over the window divided by the mean power; the same over the window with older
samples discounted (a memory of about RECENT_SAMPLES) gives the present value while the
resistance still rises. F
is the loss-free transition (the loss's temperature slope is left out of G: a stated
simplification, small for real slopes).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import numpy.typing as npt
from scipy import linalg, signal

from phaseward.physics.estimator import DiscreteModel

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]

# The carried accumulators of each channel's window, in this order (DriftCarry.window).
WINDOW_FIELDS = ("count", "sum_u_k", "sum_u2_k2", "sum_p_w")


TICK = 1e-6  # resolution of the statistic, in units of the std of z
X_CLIP = 1e3  # largest increment counted, in std: beyond it the reading is broken, not drifting


def cusum_upper(x: npt.ArrayLike, start: npt.ArrayLike = 0.0) -> FloatArray:
    """S_n = max(0, S_{n-1} + x_n) from S_0 = ``start`` >= 0, along axis 0, in closed form.

    x: (n,) or (n, m) increments (z - k for Page's upper CUSUM), NaN adds nothing;
    start: float or (m,). Returns S with the shape of x (S_1 .. S_n). The sums run in
    integers on a grid of TICK (increments clipped to +-X_CLIP): exact, so S is the same
    however a sequence is split into calls that carry it.

    >>> cusum_upper([1.0, -3.0, 2.0, np.nan, 0.5], start=1.0).tolist()
    [2.0, 0.0, 2.0, 2.0, 2.5]
    """
    inc = np.asarray(x, dtype=np.float64)
    ticks = np.where(np.isfinite(inc), np.rint(np.clip(inc, -X_CLIP, X_CLIP) / TICK), 0.0)
    partial = np.cumsum(ticks.astype(np.int64), axis=0) + np.rint(
        np.asarray(start, dtype=np.float64) / TICK
    ).astype(np.int64)
    s = partial - np.minimum(np.minimum.accumulate(partial, axis=0), 0)
    return s.astype(np.float64) * TICK


@dataclass(frozen=True)
class SteadyInnovation:
    """The steady-state filter's innovations for one model (see the module docstring).

    std_k: (n_phases,) sqrt(S_pp), K; correlation: (n_phases, n_phases) of S (the channels
    treat the phases' innovations as independent; :func:`channels` says why that holds);
    dc_gain: (n_phases, n_phases) G, innovation per kelvin of persistent sensed excess.
    """

    std_k: FloatArray
    correlation: FloatArray
    dc_gain: FloatArray

    @cached_property
    def scale(self) -> InnovationScale:
        """What :func:`channels` needs of it."""
        return InnovationScale(self.std_k, np.diag(self.dc_gain), self.dc_gain.sum(axis=1))

    @cached_property
    def scale_rows(self) -> FloatArray:
        """:attr:`scale` as rows (3, n_phases): std_k, own_gain, row_gain."""
        return np.stack([self.scale.std_k, self.scale.own_gain, self.scale.row_gain])


@dataclass(frozen=True)
class InnovationScale:
    """std_k: sqrt(S_pp) (K); own_gain: G_pp; row_gain: sum_o G_po. Each (n_phases,), or
    (n, n_phases) when samples were filtered at different steps."""

    std_k: FloatArray
    own_gain: FloatArray
    row_gain: FloatArray


def steady_innovation(model: DiscreteModel) -> SteadyInnovation:
    """Steady-state innovation covariance and its DC gain G for ``model``.

    Raises numpy.linalg.LinAlgError when the discrete Riccati equation has no stabilising
    solution in float64 (steps far below the network's time constants with almost no
    process noise put the pencil's eigenvalues on the unit circle).

    >>> from phaseward.physics.estimator import discrete_model
    >>> from phaseward.physics.thermal import CauerStages, build_coupled_network
    >>> net = build_coupled_network([CauerStages(np.array([2.0]), np.array([0.5]))],
    ...                             board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> s = steady_innovation(discrete_model(net, 1.0, process_noise_w=0.1, sensor_noise_k=0.5))
    >>> bool(0.0 < s.dc_gain[0, 0] < 1.0), bool(s.std_k[0] > 0.5)  # partly absorbed; S > R
    (True, True)
    """
    n, n_ph = model.n_states, model.n_phases
    f = model.transition
    h = np.zeros((n_ph, n))
    h[np.arange(n_ph), model.sensor_state] = 1.0
    r = np.diag(model.sensor_var_k2)
    prior = linalg.solve_discrete_are(f.T, h.T, model.process_cov_k2, r)
    s = h @ prior @ h.T + r
    gain = linalg.solve(s, h @ prior, assume_a="pos").T  # K = P- H^T S^-1
    closed = np.eye(n) - f @ (np.eye(n) - gain @ h)
    dc = np.eye(n_ph) - h @ linalg.solve(closed, f @ gain)
    std = np.sqrt(np.diag(s))
    return SteadyInnovation(std, s / np.outer(std, std), dc)


def channels(
    z: FloatArray,
    scale: InnovationScale,
    power_w: FloatArray,
    excluded: BoolArray | None = None,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Per sample: each channel's normalised statistic input, bias-equivalent excess u (K) and
    the power it is divided by (W). z, power_w, excluded: (n, n_phases); with ``excluded``
    None the result is the phases' channels (n, n_phases), else the board's (n, 1).

    A phase's channel is its contrast with the other phases read, (z_p - mean_o z_o) /
    sqrt(1 + 1/n_o) (z_p alone when no other is read): a drift of the shared board path moves
    every phase alike and is the board's, not theirs. The board's channel is the sum of z
    over the phases read and not ``excluded`` (those in a drift episode of their own: their
    excess is theirs) over sqrt(their count). Both treat the phases' innovations as
    independent, which the steady-state filter bears out when the board's capacitance is
    large against the junctions' (``SteadyInnovation.correlation`` of the test rails is below
    0.01; a positive correlation would make false alarms earlier, not later). u of a phase is
    its own e / G_pp (the excess it would carry alone); of the board, sum e / sum (G 1).

    >>> s = SteadyInnovation(np.ones(2), np.eye(2), 0.5 * np.eye(2)).scale
    >>> zc, u, p = channels(np.array([[2.0, 1.0]]), s, np.array([[2.0, 3.0]]))
    >>> zc.round(4).tolist(), u.tolist(), p.tolist()
    ([[0.7071, -0.7071]], [[4.0, 2.0]], [[2.0, 3.0]])
    >>> zc, u, p = channels(np.array([[2.0, 1.0]]), s, np.array([[2.0, 3.0]]),
    ...                     excluded=np.array([[True, False]]))
    >>> zc.tolist(), u.tolist(), p.tolist()
    ([[1.0]], [[2.0]], [[5.0]])
    """
    seen = np.isfinite(z)
    e = np.where(seen, z * scale.std_k, 0.0)
    z0 = np.where(seen, z, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        if excluded is None:
            others = seen.sum(axis=1, keepdims=True) - seen
            mean_others = (z0.sum(axis=1, keepdims=True) - z0) / others
            contrast = np.where(others > 0, (z - mean_others) / np.sqrt(1.0 + 1.0 / others), z)
            u = np.where(seen, e / scale.own_gain, np.nan)
            return contrast, u, power_w
        used = seen & ~excluded
        count = used.sum(axis=1)
        board_z = np.where(used, z0, 0.0).sum(axis=1) / np.sqrt(count)
        gain = np.where(used, scale.row_gain, 0.0).sum(axis=1)
        board_u = np.where(used, e, 0.0).sum(axis=1) / gain
        ok = count > 0
        return (
            np.where(ok, board_z, np.nan)[:, None],
            np.where(ok, board_u, np.nan)[:, None],
            power_w.sum(axis=1)[:, None],
        )


@dataclass(frozen=True)
class DriftCarry:
    """What the test carries from one batch to the next, per channel (m,): whether an episode
    is open, the statistic (S while watching, C while open), and the window's accumulators
    (WINDOW_FIELDS, (4, m)) with the time its first sample was taken (NaN: empty)."""

    raised: BoolArray
    statistic: FloatArray
    window: FloatArray
    start_t_s: FloatArray
    recent: FloatArray  # (4, m) the window's discounted sums (WINDOW_FIELDS order)

    @classmethod
    def fresh(cls, m: int) -> DriftCarry:
        return cls(
            np.zeros(m, bool), np.zeros(m), np.zeros((4, m)), np.full(m, np.nan),
            np.zeros((4, m)),
        )  # fmt: skip


@dataclass(frozen=True)
class DriftRun:
    """Result of :func:`drift_run`. Per sample and channel (n, m): the statistic, whether an
    episode is open, the window accumulators (4, n, m) and the window's start time; the
    changes as (sample, channel, raised) in sample order; the carry after the last sample."""

    statistic: FloatArray
    raised: BoolArray
    window: FloatArray
    start_t_s: FloatArray
    recent: FloatArray  # (4, n, m): the window's discounted sums after each sample
    changes: list[tuple[int, int, bool]]
    carry: DriftCarry


def drift_run(
    z: FloatArray,
    u_k: FloatArray,
    power_w: FloatArray,
    t_s: FloatArray,
    carry: DriftCarry,
    *,
    reference: float,
    threshold: float,
) -> DriftRun:
    """Page's CUSUM over each channel's z (n, m) from ``carry``; see the module docstring.

    u_k, power_w (n, m): what the window accumulates for the estimate (ignored where z is
    NaN); t_s: (n,). reference: k > 0, threshold: h > 0, both in units of the std of z. The
    result depends on the samples alone, not on how they are split into calls (the carry
    holds the statistic and the window exactly).

    >>> z = np.array([[0.0], [3.0], [3.0], [3.0], [0.0], [0.0], [0.0], [0.0]])
    >>> run = drift_run(z, z, np.ones_like(z), np.arange(8.0), DriftCarry.fresh(1),
    ...                 reference=1.0, threshold=3.0)
    >>> run.changes, run.statistic[:, 0].tolist()
    ([(2, 0, True), (7, 0, False)], [0.0, 2.0, 4.0, 0.0, 1.0, 2.0, 3.0, 4.0])
    >>> run.window[0, :, 0].tolist(), run.start_t_s[:, 0].tolist()  # window from sample 1
    ([0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0], [nan, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0])
    >>> run.carry.window[0].tolist(), run.carry.raised.tolist()  # the next call starts afresh
    ([0.0], [False])
    """
    n, m = z.shape
    seen = np.isfinite(z)
    raised = np.empty((n, m), dtype=bool)
    stat = np.empty((n, m))
    reset = np.zeros((n, m), dtype=bool)  # S at zero: the window restarts after this sample
    closed = np.zeros((n, m), dtype=bool)  # a clear: its sample still counts, the next not
    changes: list[tuple[int, int, bool]] = []
    # All channels in one pass; only a channel that raises or clears in the batch is taken
    # again on its own, one turn per raise or clear.
    up0 = carry.raised.astype(bool)
    s_all = cusum_upper(np.where(up0, -1.0, 1.0) * (z - reference), carry.statistic)
    crossed = (s_all > threshold).any(axis=0)
    stat[:] = s_all
    raised[:] = up0
    reset[:] = ~up0 & (s_all <= 0.0)
    for c in np.flatnonzero(crossed):
        pos, up, s0 = 0, bool(carry.raised[c]), float(carry.statistic[c])
        while pos < n:
            x = (z[pos:, c] - reference) if not up else (reference - z[pos:, c])
            s = cusum_upper(x, s0)
            over = np.flatnonzero(s > threshold)
            stop = n if over.size == 0 else pos + int(over[0]) + 1
            stat[pos:stop, c] = s[: stop - pos]
            raised[pos:stop, c] = up
            reset[pos:stop, c] = (not up) & (s[: stop - pos] <= 0.0)
            if over.size == 0:
                break
            changes.append((stop - 1, int(c), not up))
            raised[stop - 1, c] = not up
            closed[stop - 1, c] = up
            up, s0, pos = not up, 0.0, stop
    changes.sort()
    q = np.stack([seen, np.where(seen, u_k, 0.0), np.where(seen, u_k**2, 0.0),
                  np.where(seen, power_w, 0.0)]).astype(np.float64)  # fmt: skip
    total = np.cumsum(q, axis=1)
    rows = np.arange(n)[:, None]
    marks = np.where(reset, rows, -1)
    marks[1:] = np.maximum(marks[1:], np.where(closed[:-1], rows[:-1], -1))
    last_reset = np.maximum.accumulate(marks, axis=0)  # (n, m)
    col = np.arange(m)[None, :]
    at = np.maximum(last_reset, 0)
    before = np.where(last_reset >= 0, total[:, at, col], -carry.window[:, None, :])
    window = total - before
    # Start: the first sample read after the last reset, or the carried start.
    nxt = np.minimum.accumulate(np.where(seen, rows, n)[::-1], axis=0)[::-1]  # next read row
    first = t_s[np.minimum(nxt[np.minimum(last_reset + 1, n - 1), col], n - 1)]
    carried = (last_reset < 0) & (carry.window[0] > 0)[None, :]
    start = np.where(window[0] > 0, np.where(carried, carry.start_t_s[None, :], first), np.nan)
    end = closed[-1]
    turned = np.zeros(m, dtype=bool)  # a raise or clear at the last sample restarts at zero
    turned[[c for k, c, _ in changes if k == n - 1]] = True
    # The same window with older samples discounted by DECAY per sample read: the discounted
    # sums D of this call (from zero), less what fell before the reset, or plus the carry.
    discounted = _discounted(q, seen)
    count = np.cumsum(seen, axis=0)
    since = count - np.where(last_reset >= 0, count[at, col], 0)
    base = np.where(last_reset >= 0, -discounted[:, at, col], carry.recent[:, None, :])
    recent = discounted + DECAY**since * base
    final = DriftCarry(
        raised[-1].copy(), np.where(turned, 0.0, stat[-1]), np.where(end, 0.0, window[:, -1]),
        np.where(end, np.nan, start[-1]), np.where(end, 0.0, recent[:, -1]),
    )  # fmt: skip
    return DriftRun(stat, raised, window, start, recent, changes, final)


RECENT_SAMPLES = 600.0  # memory of the recent estimate, samples (10 min at 1 Hz), a choice
DECAY = 1.0 - 1.0 / RECENT_SAMPLES


def _discounted(x: FloatArray, seen: BoolArray) -> FloatArray:
    """D_k = DECAY D_{k-1} + x_k over the samples ``seen`` (n, m), from zero, held where a
    sample is not seen: (q, n, m). scipy.signal.lfilter runs the recursion; channels read at
    every sample go in one call."""
    q, n, m = x.shape
    if n == 1:  # one step from zero, exactly as lfilter takes it (1 x + 0: -0.0 becomes 0.0)
        return np.where(seen, x, 0.0) + 0.0
    out = np.empty((q, n, m))
    whole = seen.all(axis=0)
    if whole.any():
        out[:, :, whole] = signal.lfilter([1.0], [1.0, -DECAY], x[:, :, whole], axis=1)
    for c in np.flatnonzero(~whole):
        rows = np.flatnonzero(seen[:, c])
        y = signal.lfilter([1.0], [1.0, -DECAY], x[:, rows, c], axis=1)
        latest = np.searchsorted(rows, np.arange(n), side="right")  # rows read so far
        out[:, :, c] = np.concatenate([np.zeros((q, 1)), y], axis=1)[:, latest]
    return out


def recent_resistance(recent: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Extra thermal resistance over the window's recent samples and its standard error (K/W),
    from discounted sums (4, ...) in WINDOW_FIELDS order: the same estimate as
    :func:`extra_resistance` with each sample weighted DECAY^(samples read since), so over a
    short window it is the window's and over a long one that of about its last
    RECENT_SAMPLES: the present value while a resistance still rises. Its standard error takes
    the sum of the weights as the number of samples (the exact effective number of an
    exponentially weighted mean is up to twice that: the error is stated wide, not narrow).

    >>> w = DECAY ** np.arange(3)[::-1]  # three samples, the newest weighted 1
    >>> u = np.array([1.0, 2.0, 3.0])
    >>> r, se = recent_resistance(np.array([w.sum(), w @ u, w @ u**2, 2.0 * w.sum()]))
    >>> round(float(r), 4), round(float(se), 4)  # about 2 K at 2 W
    (1.0006, 0.2359)
    """
    weight, sum_u, sum_u2, sum_p = recent
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_u = sum_u / weight
        mean_p = sum_p / weight
        sd = np.sqrt(np.maximum(sum_u2 / weight - mean_u**2, 0.0))
        ok = (weight >= 2.0) & (mean_p > 0)
        r = np.where(ok, sum_u / sum_p, np.nan)
        se = np.where(ok, sd / np.sqrt(weight) / mean_p, np.nan)
    return r, se


def drift_watch(
    z: FloatArray,
    scale: InnovationScale,
    power_w: FloatArray,
    t_s: FloatArray,
    carry: DriftCarry,
    *,
    reference: float,
    threshold: float,
) -> DriftRun:
    """The test over the phases' channels, then the board's (which leaves out the phases in
    an episode of their own): one :class:`DriftRun` of n_phases + 1 channels, the board last.

    z, power_w: (n, n_phases) normalised innovations (NaN: no reading) and losses; t_s: (n,);
    ``carry`` of n_phases + 1 channels.
    """
    n_ph = z.shape[1]
    phase_in = channels(z, scale, power_w)
    # Most batches open or close no phase's episode: the board then leaves out the phases
    # whose episode the carry holds open, and one run over every channel gives the result.
    carried = np.broadcast_to(carry.raised[:n_ph], z.shape)
    board_in = channels(z, scale, power_w, excluded=carried)
    every_z, every_u, every_p = (np.hstack(pair) for pair in zip(phase_in, board_in, strict=True))
    run = drift_run(every_z, every_u, every_p, t_s, carry, reference=reference, threshold=threshold)
    if all(c == n_ph for _, c, _ in run.changes):
        return run

    def part(cols: slice) -> DriftCarry:
        return DriftCarry(
            carry.raised[cols], carry.statistic[cols], carry.window[:, cols],
            carry.start_t_s[cols], carry.recent[:, cols],
        )  # fmt: skip

    phases = drift_run(
        *phase_in, t_s, part(slice(0, n_ph)), reference=reference, threshold=threshold
    )
    board_in = channels(z, scale, power_w, excluded=phases.raised)
    board = drift_run(
        *board_in, t_s, part(slice(n_ph, None)), reference=reference, threshold=threshold
    )
    changes = sorted(phases.changes + [(k, n_ph, on) for k, _, on in board.changes])
    a, b = phases.carry, board.carry
    return DriftRun(
        statistic=np.hstack([phases.statistic, board.statistic]),
        raised=np.hstack([phases.raised, board.raised]),
        window=np.concatenate([phases.window, board.window], axis=2),
        start_t_s=np.hstack([phases.start_t_s, board.start_t_s]),
        recent=np.concatenate([phases.recent, board.recent], axis=2),
        changes=changes,
        carry=DriftCarry(
            np.concatenate([a.raised, b.raised]), np.concatenate([a.statistic, b.statistic]),
            np.hstack([a.window, b.window]), np.concatenate([a.start_t_s, b.start_t_s]),
            np.hstack([a.recent, b.recent]),
        ),
    )  # fmt: skip


def extra_resistance(window: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Extra thermal resistance and its standard error (K/W) from window accumulators
    (4, ...) in WINDOW_FIELDS order: sum u / sum P, and the standard error of the mean of u
    over the mean power. NaN where the window holds fewer than two samples or no power.

    >>> u = np.array([1.0, 2.0, 3.0])  # K, with 2 W each time
    >>> r, se = extra_resistance(np.array([3.0, u.sum(), (u**2).sum(), 6.0]))
    >>> float(r), round(float(se), 4)  # 2 K / 2 W; std 1 K / sqrt(3) / 2 W
    (1.0, 0.2887)
    """
    count, sum_u, sum_u2, sum_p = window
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_u = sum_u / count
        var_u = np.maximum(sum_u2 - count * mean_u**2, 0.0) / (count - 1)
        mean_p = sum_p / count
        ok = (count >= 2) & (mean_p > 0)
        r = np.where(ok, sum_u / sum_p, np.nan)
        se = np.where(ok, np.sqrt(var_u / count) / mean_p, np.nan)
    return r, se
