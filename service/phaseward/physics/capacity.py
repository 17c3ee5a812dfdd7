"""Remaining capacity of a rail: the largest total current its active phases can carry.

With sharing weights w_i (observed from telemetry) renormalised over the active phases of a
case, phase i carries w_i I of the rail current I. The capacity is the largest I such that
every active phase stays within its current rating, w_i I <= I_rated,i, and within its
junction temperature limit (the caller passes limit minus margin) in steady state, computed
with the coupled network of :mod:`thermal` and the temperature-dependent losses of
:mod:`losses`. Lost phases carry no current and dissipate nothing but remain passive heat
paths in the network.

Steady-state junction temperature grows monotonically with I (losses grow with |I|, and
the network's inverse system matrix is elementwise non-negative), so the thermal bound is
the root of g(I) = max_i (T_j,i(I) - limit_i) over the active phases. All cases are solved
at once by vectorised bracketing (:func:`thermal.bracketed_root`) to a relative tolerance of
1e-6, reporting the lower (safe) end. Where the loss feedback would run away below the
current limit, g is +inf there and the capacity is the largest I with a stable steady state
under the limit (the temperature diverges as the runaway point is approached, so the limit
is crossed first).
"""

from collections.abc import Callable
from dataclasses import dataclass
from itertools import combinations

import numpy as np
import numpy.typing as npt

from phaseward.physics.losses import PhaseLossParams, loss_coefficients
from phaseward.physics.thermal import (
    Peaks,
    ThermalNetwork,
    bracketed_root,
    peak_family,
    steady_state_c,
)

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]
IntArray = npt.NDArray[np.intp]
StrArray = npt.NDArray[np.str_]


@dataclass(frozen=True, eq=False)
class CapacityResult:
    """Per case (n_cases,): capacity in A, the binding phase (-1 if none) and what binds.

    binding_kind: "rating" (a phase reaches its current rating), "trip_current" (its trip
    current, where that is below the rating), "warning_line" (a junction reaches the line the
    caller passes, the warning line), or "none" (no active phase: capacity 0).
    junction_c_at_capacity: (n_cases, n_phases) steady-state junction temperatures in degC at
    the capacity, NaN for lost phases.
    """

    capacity_a: FloatArray
    binding_phase: IntArray
    binding_kind: StrArray
    junction_c_at_capacity: FloatArray


def remaining_capacity(
    net: ThermalNetwork,
    params: PhaseLossParams,
    *,
    active: npt.ArrayLike,
    weights: npt.ArrayLike,
    rated_current_a: npt.ArrayLike,
    temp_limit_c: npt.ArrayLike,
    ambient_c: float,
    trip_current_a: npt.ArrayLike | None = None,
    rtol: float = 1e-6,
) -> CapacityResult:
    """Remaining capacity of every case (an active-phase mask) in one call.

    active: (n_cases, n_phases) bool; weights: (n_cases, n_phases) or (n_phases,) >= 0 (only
    their ratios over the active phases matter); rated_current_a: (n_phases,) > 0 in A;
    trip_current_a: (n_phases,) > 0 in A, default: no trip below the rating;
    temp_limit_c: (n_phases,) junction limit minus margin in degC; ambient_c in degC.

    >>> from phaseward.physics.thermal import CauerStages, build_coupled_network
    >>> chain = CauerStages(np.array([4.0, 6.0]), np.array([0.2, 2.0]))
    >>> net = build_coupled_network([chain] * 4, board_to_ambient_k_per_w=0.5,
    ...                             board_c_j_per_k=200.0)
    >>> params = PhaseLossParams.build(4, vin_v=12.0, vout_v=1.0, fsw_hz=500e3,
    ...     inductance_h=150e-9, dcr_ohm=0.2e-3, rds_high_ohm=4e-3, rds_low_ohm=1e-3,
    ...     rds_tc_per_k=0.004)
    >>> active = np.array([[True] * 4, [False, True, True, True]])  # all, then phase 0 lost
    >>> res = remaining_capacity(net, params, active=active, weights=np.ones(4),
    ...     rated_current_a=np.full(4, 40.0), temp_limit_c=np.full(4, 56.0), ambient_c=25.0)
    >>> np.round(res.capacity_a, 2), res.binding_kind.tolist()  # identical phases: any binds
    (array([158.45, 120.  ]), ['warning_line', 'rating'])
    >>> np.round(res.junction_c_at_capacity[1], 2)  # the board runs cooler with one phase out
    array([ nan, 55.2, 55.2, 55.2])
    """
    n = net.n_phases
    if params.n_phases != n:
        raise ValueError(f"params describe {params.n_phases} phases, the network {n}")
    act = np.asarray(active)
    if act.dtype != np.bool_ or act.ndim != 2 or act.shape[1] != n:
        raise ValueError(f"active must be a boolean array of shape (n_cases, {n})")
    share = np.array(np.broadcast_to(_per_phase("weights", weights, n, ndim=(1, 2)), act.shape))
    if np.any(share < 0.0):
        raise ValueError("weights must be >= 0")
    rated = _per_phase("rated_current_a", rated_current_a, n)
    if not np.all(rated > 0.0):
        raise ValueError("rated_current_a must be > 0")
    trip = rated if trip_current_a is None else _per_phase("trip_current_a", trip_current_a, n)
    if not np.all(trip > 0.0):
        raise ValueError("trip_current_a must be > 0")
    limit = _per_phase("temp_limit_c", temp_limit_c, n)
    ambient = float(_per_phase("ambient_c", ambient_c, n, ndim=(0,)))
    if not 0.0 < rtol < 1.0:
        raise ValueError("rtol must lie in (0, 1)")
    share *= act
    total = share.sum(axis=1)
    if np.any(act.any(axis=1) & (total <= 0.0)):
        raise ValueError("weights must be positive for at least one active phase of each case")
    share /= np.where(total > 0.0, total, 1.0)[:, None]

    n_cases = act.shape[0]

    def evaluate(rows: IntArray, current_a: FloatArray) -> tuple[FloatArray, FloatArray]:
        """Steady junction temperatures (len(rows), n_phases) at rail currents (len(rows),)
        and their largest excess over the limit among the active phases."""
        p0, slope = loss_coefficients(params, share[rows] * current_a[:, None])
        on = act[rows]
        temps, runaway = steady_state_c(net, p0 * on, slope * on, ambient, runaway="flag")
        junction = np.where(runaway[:, None], np.inf, temps[:, net.junction_node])
        return np.asarray(np.where(on, junction - limit, -np.inf).max(axis=1)), junction

    # The answer is a current evaluated on the way (no load, the current limit, or the low
    # end of the root's bracket): its temperatures are kept, not solved again.
    held = np.empty((n_cases, n))

    def excess(rows: IntArray, current_a: FloatArray) -> FloatArray:
        over, junction = evaluate(rows, current_a)
        holds = ~(over > 0.0)  # what bracketed_root takes as its new low end
        held[rows[holds]] = junction[holds]
        return over

    every = np.arange(n_cases)
    some = act.any(axis=1)
    with np.errstate(divide="ignore"):
        per_phase_limit = np.where(share > 0.0, np.minimum(rated, trip) / share, np.inf)
    current_limit = np.where(some, per_phase_limit.min(axis=1), 0.0)
    current_phase = np.argmin(per_phase_limit, axis=1)
    current_kind = np.where(rated <= trip, "rating", "trip_current")[current_phase]
    ends, junction = evaluate(np.r_[every, every], np.r_[np.zeros(n_cases), current_limit])
    f_zero, f_limit = ends[:n_cases], ends[n_cases:]
    cold = f_zero > 0.0
    kind = np.where(~some, "none", np.where((f_limit <= 0.0) & ~cold, current_kind, "warning_line"))
    by_current = (kind == "rating") | (kind == "trip_current")
    capacity = np.where(by_current, current_limit, 0.0)
    held[:] = np.where(by_current[:, None], junction[n_cases:], junction[:n_cases])
    rows = np.flatnonzero((kind == "warning_line") & ~cold)
    if rows.size:
        capacity[rows], _ = bracketed_root(
            lambda i: excess(rows, i), np.zeros(rows.size), current_limit[rows], rtol=rtol,
            f_lo=f_zero[rows], f_hi=f_limit[rows],
        )  # fmt: skip
    temps = np.where(act, held, np.nan)
    hottest = np.argmax(np.where(act, temps - limit, -np.inf), axis=1)
    phase = np.where(by_current, current_phase, np.where(kind == "warning_line", hottest, -1))
    return CapacityResult(
        capacity_a=capacity,
        binding_phase=phase.astype(np.intp),
        binding_kind=kind,
        junction_c_at_capacity=temps,
    )


@dataclass(frozen=True, eq=False)
class RatingTable:
    """Per case and duration (n_cases, n_durations): the highest constant rail current in A,
    what binds it ("rating", "trip_current", "warning_line", or "none" with no active phase)
    and the binding phase (-1 if none)."""

    rating_a: FloatArray
    binding_kind: StrArray
    binding_phase: IntArray


def time_limited_ratings(
    net: ThermalNetwork,
    params: PhaseLossParams,
    *,
    active: npt.ArrayLike,
    weights: npt.ArrayLike,
    rated_current_a: npt.ArrayLike,
    trip_current_a: npt.ArrayLike,
    warning_c: npt.ArrayLike,
    initial_c: npt.ArrayLike,
    ambient_c: float,
    duration_s: npt.ArrayLike,
    rtol: float = 1e-4,
) -> RatingTable:
    """Highest constant rail current each case carries for each duration from ``initial_c``.

    The current shares as in :func:`remaining_capacity`. A load I is allowed for a duration D
    if no active phase's current passes its rating or its trip current and no active
    junction passes its warning line at any time in [0, D] (D = np.inf: ever, steady state
    included), with the transient solved exactly (:func:`thermal.peak_family`). Temperatures
    grow with I, so the thermal bound is a root in I, found for the whole case x duration
    grid at once (relative tolerance ``rtol``, the lower and safe end reported). A case
    already past a warning line at no load gets 0.

    The search keeps the modes fixed while the load varies. The loss P = p0(I) + s(I) T has
    a slope s(I) that grows with |I| (the resistances' temperature coefficients), and the
    modes depend on s. With the slope held at s_a and the intercept p0(I) + (s(I) - s_a)
    T_floor (T_floor: the lowest of ambient and the present node temperatures, below which
    no node falls while losses are >= 0), the difference from the exact temperatures obeys
    C d' = -A_a d + E (s_a - s(I)) (T_j - T_floor) with d(0) = 0. A_a has no positive
    off-diagonal entry, so exp(-C^-1 A_a t) >= 0 (Berman and Plemmons, Nonnegative Matrices
    in the Mathematical Sciences, ch. 6): with s_a >= s(I) the held modes run hot (a load
    they allow is allowed), with s_a <= s(I) cool (a load they refuse is refused). Rounds of
    both bounds, their slopes taken ever closer to the answer, shrink the bracket without an
    eigen-decomposition per trial load; the answer is then checked with its own modes, and
    searched exactly below where the check fails (losses below 0 W at T_floor).

    active: (n_cases, n_phases) bool; weights: (n_phases,) or (n_cases, n_phases);
    rated_current_a, trip_current_a, warning_c: (n_phases,); initial_c: (n_nodes,) node
    temperatures now; duration_s: (n_durations,) > 0, np.inf allowed.

    >>> from phaseward.physics.thermal import CauerStages, build_coupled_network
    >>> chain = CauerStages(np.array([4.0, 6.0]), np.array([0.2, 2.0]))
    >>> net = build_coupled_network([chain] * 4, board_to_ambient_k_per_w=0.5,
    ...                             board_c_j_per_k=200.0)
    >>> params = PhaseLossParams.build(4, vin_v=12.0, vout_v=1.0, fsw_hz=500e3,
    ...     inductance_h=150e-9, dcr_ohm=0.2e-3, rds_high_ohm=4e-3, rds_low_ohm=1e-3,
    ...     rds_tc_per_k=0.004)
    >>> table = time_limited_ratings(net, params, active=np.ones((1, 4), dtype=bool),
    ...     weights=np.ones(4), rated_current_a=np.full(4, 60.0),
    ...     trip_current_a=np.full(4, 70.0), warning_c=np.full(4, 56.0),
    ...     initial_c=np.full(9, 25.0), ambient_c=25.0, duration_s=[1.0, 10.0, np.inf])
    >>> np.round(table.rating_a)  # from cold, 1 s: the current rating binds
    array([[240., 212., 158.]])
    >>> table.binding_kind.tolist()
    [['rating', 'warning_line', 'warning_line']]
    """
    n = net.n_phases
    act = np.asarray(active)
    if act.dtype != np.bool_ or act.ndim != 2 or act.shape[1] != n:
        raise ValueError(f"active must be a boolean array of shape (n_cases, {n})")
    share = np.array(np.broadcast_to(_per_phase("weights", weights, n, ndim=(1, 2)), act.shape))
    share *= act
    total = share.sum(axis=1)
    share /= np.where(total > 0.0, total, 1.0)[:, None]
    rated = _per_phase("rated_current_a", rated_current_a, n)
    trip = _per_phase("trip_current_a", trip_current_a, n)
    warning = _per_phase("warning_c", warning_c, n)
    duration = np.asarray(duration_s, dtype=np.float64)
    if duration.ndim != 1 or np.any(np.isnan(duration)) or not np.all(duration > 0.0):
        raise ValueError("duration_s must have shape (n_durations,) and be > 0")
    n_cases, n_dur = act.shape[0], duration.size
    case = np.repeat(np.arange(n_cases), n_dur)  # the grid, flattened case-major
    span = np.tile(duration, n_cases)
    offset = np.where(act, warning, np.inf)
    start = np.asarray(initial_c, dtype=np.float64)
    floor_c = min(float(ambient_c), float(start.min()))  # no node gets cooler than this

    def bounded(rows: IntArray, lo_a: FloatArray, hi_a: FloatArray, hot: BoolArray) -> _Peaks:
        """Peaks of ``rows`` at currents in [lo_a, hi_a], from the modes of one slope per
        row: the largest slope over the interval where ``hot`` (a bound from above), else the
        smallest (from below). See the docstring above for why these bound."""
        c, on = case[rows], act[case[rows]]
        s_lo, s_hi = (loss_coefficients(params, share[c] * x[:, None])[1] for x in (lo_a, hi_a))
        fixed = np.where(hot[:, None], np.maximum(s_lo, s_hi), np.minimum(s_lo, s_hi)) * on
        family = peak_family(net, start, fixed, ambient_c, offset[c], duration_s=span[rows])

        def excess(sub: IntArray, current_a: FloatArray) -> Peaks:
            p0, slope = loss_coefficients(params, share[c[sub]] * current_a[:, None])
            return family(sub, (p0 + (slope * on[sub] - fixed[sub]) * floor_c) * on[sub])

        return excess

    def exact(rows: IntArray, current_a: FloatArray) -> Peaks:
        same = np.ones(rows.size, dtype=bool)
        return bounded(rows, current_a, current_a, same)(np.arange(rows.size), current_a)

    bound = np.minimum(rated, trip)
    with np.errstate(divide="ignore"):
        per_phase = np.where(share > 0.0, bound / share, np.inf)
    some = act.any(axis=1) & (total > 0.0)
    current_limit = np.where(some, per_phase.min(axis=1), 0.0)[case]
    current_phase = np.argmin(per_phase, axis=1)[case]
    current_kind = np.where(rated <= trip, "rating", "trip_current")[current_phase]
    every = np.arange(case.size)
    zero = np.zeros(case.size)
    # One bound from above for every row over [0, its current limit]: where it holds at the
    # limit, the rail does; where it fails at no load, the exact answer decides.
    first = bounded(every, zero, current_limit, np.ones(case.size, dtype=bool))
    f_limit = first(every, current_limit).value
    fits = f_limit <= 0.0
    f_zero = np.full(case.size, -np.inf)  # needed only where the limit does not fit
    open_ = np.flatnonzero(~fits)
    f_zero[open_] = first(open_, zero[open_]).value
    cold = np.zeros(case.size, dtype=bool)
    check = np.flatnonzero(some[case] & ~fits & (f_zero > 0.0))
    cold[check] = exact(check, zero[check]).value > 0.0
    kind = np.where(~some[case], "none", np.where(fits, current_kind, "warning_line"))
    rating = np.where(fits, current_limit, 0.0)
    rows = np.flatnonzero(some[case] & ~fits & ~cold)
    lo, hi = np.zeros(rows.size), current_limit[rows]  # lo holds, hi does not
    guess, pull = np.full(rows.size, np.nan), np.zeros(rows.size)
    for step in range(_PASSES):
        todo = np.flatnonzero(hi - lo > rtol * hi)
        if not todo.size:
            break
        r, a, b, g = rows[todo], lo[todo], hi[todo], guess[todo]
        if step == 0:
            # From above with the slope at the limit (``first``, its ends known): where it
            # holds, the rail holds. Then from below with the slope at that answer: where it
            # fails, the rail fails.
            top = b
            got_lo = _narrow(_rows_of(first, r), a, b, rtol, ends=(f_zero[r], f_limit[r]))[0]
            bottom = got_lo
            cool = np.zeros(r.size, dtype=bool)
            got_hi = _narrow(bounded(r, bottom, b, cool), bottom, b, rtol)[1]
        else:  # both bounds at once, their slopes just either side of the guess
            top = np.clip(g * (1.0 + 0.25 * rtol), a, b)
            bottom = np.clip(g * (1.0 - 0.25 * rtol), a, top)
            ends_lo, ends_hi, hot = np.r_[a, bottom], np.r_[top, b], np.arange(2 * r.size) < r.size
            got = _narrow(bounded(np.r_[r, r], ends_lo, ends_hi, hot), ends_lo, ends_hi, rtol)
            got_lo, got_hi = got[0][: r.size], got[1][r.size :]
        # A bound with the slope at current a puts its root near I* - k (a - I*): its slope
        # errs by about (a - I*) and moves the root against it by a fraction k of that. The
        # first pass's two roots give k; each root since then gives an estimate of I*.
        with np.errstate(invalid="ignore", divide="ignore"):
            if step == 0:
                pull[todo] = (got_hi - got_lo) / (top - bottom)
            k = pull[todo]
            from_hot = np.where((got_lo > a) & (got_lo < top), (got_lo + k * top) / (1 + k), np.nan)
            from_cool = np.where(
                (got_hi < b) & (got_hi > bottom), (got_hi + k * bottom) / (1 + k), np.nan
            )
            mean = np.where(np.isnan(from_hot), from_cool, from_hot)
            mean = np.where(np.isnan(from_cool), mean, 0.5 * (mean + from_cool))
        guess[todo] = np.clip(
            np.where(np.isnan(mean), 0.5 * (got_lo + got_hi), mean), got_lo, got_hi
        )
        lo[todo], hi[todo] = got_lo, got_hi
    rating[rows] = lo
    warm = np.flatnonzero(kind == "warning_line")  # the rows whose binding phase is thermal
    peaks = exact(warm, rating[warm])
    # The bounds hold while every junction's loss P(T) at ``floor_c`` is >= 0 (so that no
    # node gets cooler than that); a rating that does not check out exactly is searched again
    # with exact peaks below it (the safe side).
    wrong = (rating[warm] > 0.0) & (peaks.value > 0.0)
    if wrong.any():
        bad = warm[wrong]
        rating[bad] = _narrow(_rows_of(exact, bad), np.zeros(bad.size), rating[bad], rtol)[0]
        peaks = exact(warm, rating[warm])
    phase = np.where(kind == "none", -1, current_phase)
    phase[warm] = peaks.phase
    return RatingTable(
        rating_a=rating.reshape(n_cases, n_dur),
        binding_kind=kind.reshape(n_cases, n_dur),
        binding_phase=phase.astype(np.intp).reshape(n_cases, n_dur),
    )


_Peaks = Callable[[IntArray, FloatArray], Peaks]  # peaks of some rows at rail currents, A
_PASSES = 6  # rounds of bounds from above and below (two or three are usual)


def _rows_of(peaks: _Peaks, rows: IntArray) -> _Peaks:
    """``peaks`` restricted to ``rows``: row k of the result is row rows[k] of ``peaks``."""
    return lambda sub, current_a: peaks(rows[sub], current_a)


def _narrow(
    peaks: _Peaks,
    lo_a: FloatArray,
    hi_a: FloatArray,
    rtol: float,
    ends: tuple[FloatArray, FloatArray] | None = None,
) -> tuple[FloatArray, FloatArray]:
    """Where ``peaks`` changes sign between lo_a and hi_a, the bracket of its root in I^2
    (where the loss, and so the excess, is nearly linear) shrunk to ``rtol`` relative in I;
    (hi_a, hi_a) where it is <= 0 at both ends, (lo_a, lo_a) where it is > 0 at both.
    ``ends``: its values at lo_a and hi_a where the caller has them."""
    every = np.arange(lo_a.size)
    f_lo, f_hi = ends or (peaks(every, lo_a).value, peaks(every, hi_a).value)
    lo = np.where(f_lo > 0.0, lo_a, hi_a)
    hi = np.where(f_hi > 0.0, lo, hi_a)
    rows = np.flatnonzero((f_lo <= 0.0) & (f_hi > 0.0))
    if rows.size:
        low, high = bracketed_root(
            lambda x: peaks(rows, np.sqrt(x)).value, lo_a[rows] ** 2, hi_a[rows] ** 2,
            rtol=2.0 * rtol, f_lo=f_lo[rows], f_hi=f_hi[rows],
        )  # fmt: skip
        lo[rows], hi[rows] = np.sqrt(low), np.sqrt(high)
    return lo, hi


def _per_phase(
    name: str, value: npt.ArrayLike, n_phases: int, *, ndim: tuple[int, ...] = (1,)
) -> FloatArray:
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim not in ndim or (arr.ndim > 0 and arr.shape[-1] != n_phases):
        raise ValueError(f"{name} has the wrong shape (n_phases={n_phases})")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite")
    return arr


def loss_cases(
    n_phases: int, depth: int, active: npt.ArrayLike | None = None
) -> tuple[BoolArray, IntArray]:
    """Every way to lose ``depth`` more of the active phases, as active masks.

    Returns ``(masks, lost)``: masks (n_cases, n_phases) bool, the remaining active phases
    of each case, and lost (n_cases, depth) int, the phases lost in it, in lexicographic
    order. ``active`` (n_phases,) bool defaults to all phases. Depth 1 gives every single
    loss, depth 2 every pair, so an N-1 or N-2 screening is one :func:`remaining_capacity`
    call.

    >>> masks, lost = loss_cases(4, 2, active=np.array([True, True, False, True]))
    >>> lost.tolist()
    [[0, 1], [0, 3], [1, 3]]
    >>> masks.astype(int).tolist()[0]
    [0, 0, 0, 1]
    """
    if isinstance(n_phases, bool) or not isinstance(n_phases, int) or n_phases < 1:
        raise ValueError("n_phases must be an int >= 1")
    if isinstance(depth, bool) or not isinstance(depth, int) or depth < 1:
        raise ValueError("depth must be an int >= 1")
    act = np.ones(n_phases, dtype=bool) if active is None else np.asarray(active)
    if act.dtype != np.bool_ or act.shape != (n_phases,):
        raise ValueError(f"active must be a boolean array of shape ({n_phases},)")
    lost = np.array(list(combinations(np.flatnonzero(act).tolist(), depth)), dtype=np.intp)
    lost = lost.reshape(-1, depth)
    masks = np.repeat(act[None, :], lost.shape[0], axis=0)
    masks[np.arange(lost.shape[0])[:, None], lost] = False
    return masks, lost
