"""The plausibility gate: which readings a rail cannot have produced.

A reading outside these ranges is more likely a broken sensor, a bad conversion or a garbled
word than a fact about the hardware; the monitor stores it as received, flags it, and judges
nothing by it. Pure and vectorised: every rule is one array comparison over a whole batch.

Rule codes (int8, 0 = plausible) index ``RULES``; each rule's basis is in the README
(section "Plausibility gate") and beside the default in ``monitor/rail_model.py``.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]
I8 = npt.NDArray[np.int8]

RULES = (
    "plausible",
    "current_above_limit",  # above a multiple of the phase's trip current, or not a number
    "current_reverse",  # flowing backwards beyond the noise band
    "temp_out_of_range",  # outside the temperature sensor's range
    "temp_below_ambient",  # colder than the air that cools it, beyond the sensors' tolerance
    "temp_rate",  # moved faster than the thermal network lets the junction move
    "vin_out_of_range",  # input voltage far above nominal
    "vout_out_of_range",  # output voltage above what a step-down converter can give
    "iout_out_of_range",  # rail current beyond what all phases together can read
    "ambient_out_of_range",  # ambient outside the temperature sensors' range
)
(
    PLAUSIBLE, CURRENT_ABOVE, CURRENT_REVERSE, TEMP_RANGE, TEMP_BELOW_AMBIENT, TEMP_RATE,
    VIN_RANGE, VOUT_RANGE, IOUT_RANGE, AMBIENT_RANGE,
) = range(len(RULES))  # fmt: skip


@dataclass(frozen=True)
class PlausibleRanges:
    """What a rail can produce. Per phase (n_phases,): current_max_a, current_min_a (negative,
    the reverse noise band), temp_min_c, temp_max_c, temp_rate_k_per_s. Scalars: the rest."""

    current_max_a: F64
    current_min_a: F64
    temp_min_c: F64
    temp_max_c: F64
    temp_rate_k_per_s: F64
    temp_step_k: float  # sensor noise and quantisation allowed on top of the rate
    below_ambient_k: float
    vin_max_v: float
    vout_max_v: float

    @cached_property
    def air_range_c(self) -> tuple[float, float]:
        """The ambient readings believed: within every phase's temperature sensor range."""
        return float(self.temp_min_c.min()), float(self.temp_max_c.min())

    @cached_property
    def iout_range_a(self) -> tuple[float, float]:
        """The rail currents believed: what all phases together can read."""
        return float(self.current_min_a.sum()), float(self.current_max_a.sum())


@dataclass(frozen=True)
class GateVerdict:
    """Per reading: the rule it broke (0: none). current, temp: (n, n_phases); vin, vout,
    iout, ambient: (n,) (a missing iout or ambient is plausible).
    ref_temp_c, ref_t_s (n_phases,): the newest temperature inside the sensor range and its
    time, which the next batch's rate rule starts from (NaN: none yet)."""

    current: I8
    temp: I8
    vin: I8
    vout: I8
    iout: I8
    ambient: I8
    ref_temp_c: F64
    ref_t_s: F64


def first_code(*cases: tuple[npt.NDArray[np.bool_], int], default: int = PLAUSIBLE) -> I8:
    """The code of the first case that holds in each cell, ``default`` where none does: what
    np.select gives for int8 codes, at a fraction of its cost per call on the small arrays of
    one sample."""
    codes: I8 = np.where(cases[-1][0], np.int8(cases[-1][1]), np.int8(default))
    for hit, code in reversed(cases[:-1]):
        codes = np.where(hit, np.int8(code), codes)
    return codes


def gate(
    ranges: PlausibleRanges,
    *,
    t_s: F64,
    present: npt.NDArray[np.bool_],
    current_a: F64,
    temp_c: F64,
    ambient_c: F64,
    vin_v: F64,
    vout_v: F64,
    iout_a: F64,
    ref_temp_c: F64,
    ref_t_s: F64,
) -> GateVerdict:
    """Judge a batch of samples in time order. ``t_s``, ``ambient_c``, ``vin_v``, ``vout_v``,
    ``iout_a`` (NaN: not reported): (n,); ``present``, ``current_a``, ``temp_c``: (n, n_phases), NaN where not reported
    (a missing reading is not implausible, only absent); ``ref_*``: from the previous batch.

    The rate rule compares each temperature with the newest earlier one that was inside the
    sensor range: the allowed change grows with the time between them.

    >>> r = PlausibleRanges(np.array([120.0]), np.array([-3.0]), np.array([-55.0]),
    ...     np.array([175.0]), np.array([10.0]), 2.0, 15.0, 24.0, 24.0)
    >>> v = gate(r, t_s=np.arange(4.0), present=np.ones((4, 1), bool),
    ...     current_a=np.array([[20.0], [1e9], [-28.0], [20.0]]),
    ...     temp_c=np.array([[60.0], [999.0], [61.0], [90.0]]), ambient_c=np.full(4, 25.0),
    ...     vin_v=np.array([12.0, 12.0, 1e6, 12.0]), vout_v=np.ones(4), iout_a=np.full(4, np.nan),
    ...     ref_temp_c=np.array([np.nan]), ref_t_s=np.array([np.nan]))
    >>> [RULES[c] for c in v.current[:, 0]]
    ['plausible', 'current_above_limit', 'current_reverse', 'plausible']
    >>> [RULES[c] for c in v.temp[:, 0]], [RULES[c] for c in v.vin]
    (['plausible', 'temp_out_of_range', 'plausible', 'temp_rate'], ['plausible', 'plausible', 'vin_out_of_range', 'plausible'])
    """  # noqa: E501
    n = t_s.shape[0]
    air_min_c, air_max_c = ranges.air_range_c
    air_ok = (ambient_c >= air_min_c) & (ambient_c <= air_max_c)
    with np.errstate(invalid="ignore"):
        current = first_code(
            ((present & ~np.isfinite(current_a)) | (current_a > ranges.current_max_a),
             CURRENT_ABOVE),
            (current_a < ranges.current_min_a, CURRENT_REVERSE),
        )  # fmt: skip
        out_of_range = (temp_c < ranges.temp_min_c) | (temp_c > ranges.temp_max_c)
        below_ambient = (
            temp_c < np.where(air_ok, ambient_c, np.nan)[:, None] - ranges.below_ambient_k
        )

        # The newest in-range temperature before each sample, carried across batches.
        usable = np.isfinite(temp_c) & ~out_of_range
        rows = np.where(usable, np.arange(n)[:, None], -1)
        newest = np.maximum.accumulate(rows, axis=0)
        before = np.concatenate([np.full((1, newest.shape[1]), -1), newest[:-1]])
        cols = np.arange(temp_c.shape[1])
        ref_temp = np.where(before >= 0, temp_c[np.maximum(before, 0), cols], ref_temp_c)
        ref_t = np.where(before >= 0, t_s[np.maximum(before, 0)], ref_t_s)
        allowed = ranges.temp_rate_k_per_s * (t_s[:, None] - ref_t) + ranges.temp_step_k
        too_fast = np.isfinite(ref_temp) & (np.abs(temp_c - ref_temp) > allowed)
    temp = first_code(
        (out_of_range, TEMP_RANGE), (below_ambient, TEMP_BELOW_AMBIENT), (too_fast, TEMP_RATE)
    )
    iout_min_a, iout_max_a = ranges.iout_range_a
    vin = first_code((vin_v > ranges.vin_max_v, VIN_RANGE))
    vout = first_code((vout_v > ranges.vout_max_v, VOUT_RANGE))
    iout = first_code(((iout_a > iout_max_a) | (iout_a < iout_min_a), IOUT_RANGE))
    ambient = first_code((~air_ok, AMBIENT_RANGE))
    last = newest[-1] if n else np.full(temp_c.shape[1], -1)
    return GateVerdict(
        current=current,
        temp=temp,
        vin=vin,
        vout=vout,
        iout=iout,
        ambient=ambient,
        ref_temp_c=np.where(last >= 0, temp_c[np.maximum(last, 0), cols], ref_temp_c),
        ref_t_s=np.where(last >= 0, t_s[np.maximum(last, 0)], ref_t_s),
    )
