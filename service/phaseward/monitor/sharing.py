"""Current sharing: declared targets, learned shares, and the shares capacity uses.

A phase's share is relative to an equal share (1.0 = equal) over the phases carrying load, so
what a phase teaches while another is isolated still holds when it returns; capacity
renormalises over whichever phases are active.

* **Declared** (``share_target`` per phase in the definition): where learning starts, and
  what the imbalance watch measures deviations from.
* **Learned**: an exponentially weighted moving average (EWMA) of each phase's share over
  the samples that teach it (while it is active, and only samples carrying a real load: at
  light load ripple and offsets dominate), at ``monitor.share_learning_rate`` per sample; an
  isolated phase keeps what it learned.
* **Used** (``weights``, what capacity, screening and forecasts take): the learned shares,
  but taken over only when a phase's learned share has moved from the used one by more than
  ``monitor.share_significance`` standard errors, so noise alone never moves capacity. This
  is an EWMA control chart (Roberts 1959; Montgomery, *Introduction to Statistical Quality
  Control*, the EWMA chart, from memory: an EWMA of rate lambda over independent samples of
  standard deviation sigma has standard deviation sigma sqrt(lambda / (2 - lambda))). The difference
  of two such averages, the used one taken from an earlier stretch, has sqrt(2) times that.
  sigma is learned per phase as an EWMA of the squared one-step innovation (whose expectation
  is sigma^2 2 / (2 - lambda), corrected here), never below ``SHARE_NOISE_FLOOR``.

With the defaults (rate 0.2, 5 standard errors, sigma at its floor of 1 %) a shift of a
phase's share by about 2.4 % of an equal share is needed before capacity moves.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy.signal import lfilter

from phaseward.monitor.rail_model import RailModel

F64 = npt.NDArray[np.float64]

# Smallest standard deviation of a sample's relative share believed: per-phase current sense
# is good to about 1 % of an equal share at best (common practice), and a first few samples
# alone would make the spread look smaller than that.
SHARE_NOISE_FLOOR = 0.01


@dataclass(frozen=True)
class Sharing:
    """End of batch: ``weights`` (used), ``learned`` and ``var`` per phase (n_phases,); per
    sample: ``weights_at`` (n, n_phases) the used shares after each sample, ``imbalance_pct``
    (n,) against the declared targets and the ``worst`` phase."""

    weights: F64
    weights_at: F64
    learned: F64
    var: F64
    imbalance_pct: F64
    worst: npt.NDArray[np.intp]


def learn(
    model: RailModel,
    codes_active: npt.NDArray[np.bool_],
    current_a: F64,
    *,
    weights: F64,
    learned: F64,
    var: F64,
) -> Sharing:
    """Sharing over a batch. codes_active, current_a: (n, n_phases); the rest (n_phases,)."""
    rules = model.rules
    rate, n_sigma = rules.share_learning_rate, rules.share_significance
    active = codes_active
    carried = np.where(active, current_a, 0.0)
    total = carried.sum(axis=1)
    n_active = active.sum(axis=1)
    rated_active = np.where(active, model.rated_current_a, 0.0).sum(axis=1)
    informative = (total > rules.min_share_load_fraction * rated_active) & (n_active > 1)
    target = np.where(active, model.share_target, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        relative = carried / total[:, None] * n_active[:, None]
        expected = target / target.sum(axis=1, keepdims=True) * n_active[:, None]
        off = np.abs(relative / expected - 1.0)
    deviation = np.where(active & informative[:, None], off, 0.0) * 100.0
    teach = active & informative[:, None]
    # A phase driving current backwards (a sinking fault, read before it is isolated) carries
    # no share of the load: it teaches a share of 0, never a negative one.
    taught = np.maximum(np.where(teach, relative, 0.0), 0.0)

    # Each phase's EWMAs step only at its teaching samples: gather those to the top of its
    # column (in order), filter all columns at once, and read each sample's value back as
    # that of the phase's latest teaching sample so far (the carried one before the first).
    phases = np.arange(model.n_phases)
    x = taught[np.argsort(~teach, axis=0, kind="stable"), phases]
    zc = _ewma(x, learned, rate)
    innovation = x - np.concatenate([learned[None, :], zc[:-1]])
    vc = _ewma(innovation**2 * (2.0 - rate) / 2.0, var, rate)
    latest = np.cumsum(teach, axis=0) - 1
    at = np.maximum(latest, 0), phases
    z = np.where(latest >= 0, zc[at], learned)
    v = np.where(latest >= 0, vc[at], var)

    sigma = np.sqrt(np.maximum(v, SHARE_NOISE_FLOOR**2))
    limit = n_sigma * np.sqrt(2.0) * ewma_std(sigma, rate)
    used = np.asarray(weights, dtype=np.float64).copy()
    used_at = np.tile(used, (z.shape[0], 1))
    start = 0
    while start < z.shape[0]:  # once per take-over, a handful per real shift
        moved = np.flatnonzero((np.abs(z[start:] - used) > limit[start:]).any(axis=1))
        if not moved.size:
            break
        start += int(moved[0])
        used = z[start].copy()
        used_at[start:] = used
        start += 1
    return Sharing(
        weights=used,
        weights_at=used_at,
        learned=z[-1],
        var=v[-1],
        imbalance_pct=deviation.max(axis=1),
        worst=deviation.argmax(axis=1),
    )


def ewma_std(sigma: F64, rate: float) -> F64:
    """Standard deviation of a settled EWMA of rate ``rate`` over independent samples of
    standard deviation ``sigma`` (the EWMA chart's limit, Montgomery; from memory, checked
    against a simulation in the tests)."""
    return np.asarray(sigma * np.sqrt(rate / (2.0 - rate)))


def _ewma(x: F64, start: F64, rate: float) -> F64:
    """EWMA down each column of ``x`` from ``start`` (n_columns,): y_k = (1 - rate) y_(k-1)
    + rate x_k, with scipy.signal.lfilter (b = [rate], a = [1, rate - 1]). A single row is
    that recurrence written out, the same arithmetic lfilter does, without its set-up cost."""
    keep = 1.0 - rate
    if x.shape[0] == 1:
        return keep * start + rate * x
    filtered: F64 = lfilter([rate], [1.0, -keep], x, axis=0, zi=keep * start[None, :])[0]
    return filtered
