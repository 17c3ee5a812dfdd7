"""Vectorised state machines over a batch of samples: debounce and hysteresis latches.

Both are "hold the last decision" recurrences. Written as a forward fill of the index of the
last deciding sample, so a batch of any length is processed without a loop per sample.
"""

from __future__ import annotations

from typing import TypeVar

import numpy as np
import numpy.typing as npt

Codes = npt.NDArray[np.int8]
Mask = npt.NDArray[np.bool_]
_Cells = TypeVar("_Cells", Codes, Mask)


def _forward_fill(decided: Mask, values: _Cells, initial: _Cells) -> _Cells:
    """values where decided, else the last decided value above, else ``initial``. (n, m)."""
    rows = np.where(decided, np.arange(decided.shape[0])[:, None], -1)
    last = np.maximum.accumulate(rows, axis=0)
    filled = values[np.maximum(last, 0), np.arange(decided.shape[1])]
    return np.where(last >= 0, filled, initial)


def debounce(raw: Codes, *, tail: Codes, prev: Codes, length: int, immediate: Mask) -> Codes:
    """Accept a new code once it has been seen ``length`` samples in a row.

    raw: (n, m) codes of this batch; tail: (length-1, m) raw codes preceding the batch (pad
    with -1 when unknown); prev: (m,) debounced codes before the batch; immediate: (n, m)
    samples whose raw code is accepted at once (a hardware flag already acted).
    Returns the debounced codes, (n, m).

    >>> raw = np.array([[0], [1], [1], [1], [0]], dtype=np.int8)
    >>> tail = np.full((2, 1), 0, dtype=np.int8)
    >>> debounce(raw, tail=tail, prev=np.zeros(1, np.int8), length=3,
    ...          immediate=np.zeros_like(raw, bool)).ravel().tolist()
    [0, 0, 0, 1, 1]
    """
    history = np.concatenate([tail[-(length - 1) :] if length > 1 else tail[:0], raw])
    stable = np.ones(raw.shape, dtype=bool)
    offset = history.shape[0] - raw.shape[0]
    for lag in range(1, length):  # loop over the debounce length, not over samples
        stable &= history[offset - lag : offset - lag + raw.shape[0]] == raw
    return _forward_fill(stable | immediate, raw, prev)


def latch(set_mask: Mask, reset_mask: Mask, prev: Mask) -> Mask:
    """Hysteresis: on where ``set_mask``, off where ``reset_mask``, else hold. (n, m) -> (n, m).

    >>> s = np.array([[False], [True], [False], [False]])
    >>> r = np.array([[False], [False], [False], [True]])
    >>> latch(s, r, np.array([False])).ravel().tolist()
    [False, True, True, False]
    """
    return _forward_fill(set_mask | reset_mask, set_mask, prev)


def changes(
    states: Codes | Mask, prev: Codes | Mask
) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]:
    """(sample, column) positions where the state differs from the one before it."""
    before = np.concatenate([prev[None, :], states[:-1]])
    rows, cols = np.nonzero(states != before)
    return rows, cols
