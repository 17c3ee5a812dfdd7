"""Calibration: a Foster network fitted to a recorded heating or cooling curve.

A power step P (W) is applied to (or removed from) a device in thermal equilibrium and its
temperature is recorded from the moment of the step (JEDEC JESD51 terms; see
:mod:`thermal` for Zth). With T_ref the zero-power equilibrium temperature (ambient, cold
plate):

* heating: T(t) = T_ref + P sum_i R_i (1 - exp(-t / tau_i)), T_ref the temperature before
  the step;
* cooling (JESD51-14 style, from equilibrium under P, power removed at t = 0):
  T(t) = T_ref + P sum_i R_i exp(-t / tau_i), T_ref the temperature it settles to.

T_ref is fitted unless ``reference_temp_c`` is given.

Method: nonlinear least squares (``scipy.optimize.least_squares``, trust-region reflective,
analytic Jacobian) on transformed parameters that keep every R_i and tau_i positive and the
time constants sorted and distinct: ln R_i, ln tau_1, and for i >= 2
ln tau_i = ln tau_(i-1) + ln(rho + exp(a_i)), so tau_i / tau_(i-1) > rho = 1.2 (two stages
closer than that are not separable from a noisy curve; our choice). Multi-start per order:
time constants log-spaced over the record (smallest positive sample time to the last) at
three offsets, plus the previous order's solution with one stage inserted at each gap; each
start's R_i and T_ref come from a bounded linear least-squares solve. The best converged
start wins.

Order selection: the Bayesian information criterion, BIC = n ln(RSS / n) + k ln n, with k
the number of fitted parameters (2 per stage, plus T_ref when fitted), lowest wins among the
converged fits. An order is tried only when the curve holds at least ``MIN_POINTS_PER_PARAM``
(4, our choice) samples per fitted parameter; the others are listed in ``skipped_orders`` (with
few points BIC lets a many-stage fit chase the noise). BIC rather than AIC because a recorded
curve holds hundreds to thousands of samples, and AIC's fixed 2k penalty then lets extra
stages through on noise; BIC's ln n penalty is consistent (selects the true order as n
grows). RSS is floored at rounding level (n (eps max|T|)^2) so a noise-free curve does not
give -inf.

Confidence intervals: 95 %, asymptotic Wald intervals in log space (local linearisation,
Gaussian residuals): the covariance of the transformed parameters is s^2 (J^T J)^-1 with
s^2 = RSS / (n - k); the delta method carries it to ln R_i, ln tau_i and ln R_th (R_th = sum
R_i, the total thermal resistance), and each interval is exp(ln x +- 1.96 SE(ln x)): never
below zero, wider above the value than below. T_ref's interval is linear (+- 1.96 SE). When J
is numerically rank deficient (a stage the data cannot pin down) the intervals are NaN and
``ci_valid`` is False.

Settled (our rule): the curve has seen its slow stage when it lasts at least
``SETTLED_TAUS`` (3) times the slowest fitted time constant, i.e. that stage has risen (or
decayed) to within exp(-3) = 5 % of its end. A shorter curve cannot pin down the total
thermal resistance (its slowest stage is extrapolated); ``settled`` is then False.

Direction: a heating curve must rise and a cooling curve fall (the mean of the last quarter of
the samples against the first quarter's, by more than the noise of the two means); a curve
that goes the other way is refused (:class:`WrongDirection`) instead of fitted to R ~ 0.

Warnings (``warnings`` of the result): a fitted stage faster than the first sample after the
step, which usually means the reference temperature is off by that stage's rise; with a given
reference temperature, the offset a fit with T_ref free finds when its interval excludes 0;
and a record longer than ``LONG_RECORD_S`` (2 h), which suggests milliseconds sent as
seconds.

Sensor not at the junction (``location="sensor"``): the same fit then describes the transfer
impedance from the heat source to the sensor's location, i.e. the sensor's rise per watt;
its sum of R_i is the steady-state rise at the sensor, not at the junction, and it must not
be used as a junction Zth. A remote sensor's early response lags (its exact transfer
impedance can have negative Foster terms, which this positive fit cannot express), so expect
a larger residual at short times. ``location`` is passed through to the result.

Failure policy: invalid arguments raise ValueError whose message starts with the argument's
name; an order whose fit does not converge is reported in ``fits`` with ``converged=False``;
if no order converges, :class:`CalibrationFailed` carries the attempts.
"""

from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np
import numpy.typing as npt
from scipy import optimize, special

from phaseward.physics.thermal import FosterStages

FloatArray = npt.NDArray[np.float64]
Location = Literal["junction", "sensor"]

_RHO = 1.2  # smallest ratio between consecutive time constants (module docstring)
_OFFSETS = (0.25, 0.5, 0.75)  # positions of the log-spaced start grids within a cell
_MAX_NFEV = 300  # function evaluations per start (a well-posed fit needs well under 100)
_RCOND = 1e-8  # J singular values below this fraction of the largest: not identifiable
_CONFIDENCE = 0.95
_LN_R_BOUND = 40.0  # |ln R| <= 40 (R within e^+-40 K/W keeps every exponential finite)
_LN_TAU_MARGIN = 20.0  # tau_1 within e^+-20 of the record's time span
_GAP_BOUND = 30.0  # |a_i| <= 30: ratios from rho to rho + e^30
MIN_POINTS_PER_PARAM = 4  # samples per fitted parameter for an order to be tried (our choice)
SETTLED_TAUS = 3.0  # settled: the curve lasts this many slowest time constants (our rule)
LONG_RECORD_S = 7200.0  # a longer record is flagged: milliseconds sent as seconds? (our choice)


class WrongDirection(ValueError):
    """A heating curve that falls, or a cooling curve that rises."""


class CalibrationFailed(ArithmeticError):
    """No model order converged; ``fits`` holds every attempt."""

    def __init__(self, message: str, fits: tuple["OrderFit", ...]) -> None:
        super().__init__(message)
        self.fits = fits


@dataclass(frozen=True, eq=False)
class OrderFit:
    """The fit of one model order.

    stages: the fitted Foster stages (tau ascending); reference_temp_c: T_ref, degC;
    r_ci_k_per_w, tau_ci_s: (order, 2) 95 % intervals (low, high), log space;
    total_r_k_per_w: sum of R_i, K/W, and total_r_ci_k_per_w: (2,) its interval (log space);
    settled: the curve lasts ``SETTLED_TAUS`` slowest time constants; reference_temp_ci_c:
    (2,) (NaN when T_ref was given); ci_valid: False when the intervals are NaN
    (rank-deficient Jacobian); rms_k: residual RMS, K; bic: the criterion; n_params: fitted
    parameters; converged / message: from ``least_squares`` for the best start.
    """

    order: int
    stages: FosterStages
    reference_temp_c: float
    r_ci_k_per_w: FloatArray
    tau_ci_s: FloatArray
    total_r_k_per_w: float
    total_r_ci_k_per_w: FloatArray
    settled: bool
    reference_temp_ci_c: FloatArray
    ci_valid: bool
    rms_k: float
    bic: float
    n_params: int
    converged: bool
    message: str


@dataclass(frozen=True, eq=False)
class CalibrationResult:
    """The chosen Foster network and every order tried.

    stages: the chosen :class:`FosterStages` (from the power source to ``location``);
    order: its number of stages; reference_temp_c: its T_ref, degC; fits: one
    :class:`OrderFit` per order tried, in the order given; skipped_orders: orders not tried
    (too few samples per parameter); warnings: plain-text doubts (module docstring);
    reference_offset_k / reference_offset_ci_k: with T_ref given, T_ref fitted minus given and
    its interval (NaN otherwise); criterion: "bic".
    """

    stages: FosterStages
    order: int
    reference_temp_c: float
    fits: tuple[OrderFit, ...]
    location: Location
    cooling: bool
    power_w: float
    skipped_orders: tuple[int, ...] = ()
    warnings: tuple[str, ...] = ()
    reference_offset_k: float = float("nan")
    reference_offset_ci_k: tuple[float, float] = (float("nan"), float("nan"))
    criterion: Literal["bic"] = "bic"

    @property
    def chosen(self) -> OrderFit:
        """The :class:`OrderFit` of the chosen order."""
        return next(f for f in self.fits if f.order == self.order)


@dataclass(frozen=True, eq=False)
class _Problem:
    t_s: FloatArray
    temp_c: FloatArray
    power_w: float
    cooling: bool
    reference_temp_c: float | None  # None: fitted

    def shape(self, tau_s: FloatArray) -> FloatArray:
        """(n, order) response shape per stage: 1 - exp(-t/tau) or exp(-t/tau)."""
        x = self.t_s[:, None] / tau_s[None, :]
        return np.exp(-x) if self.cooling else -np.expm1(-x)


def _tau_transform(a: FloatArray) -> tuple[FloatArray, FloatArray]:
    """ln tau (order,) from a (order,) and its Jacobian d ln tau / d a (order, order)."""
    steps = np.concatenate([a[:1], np.logaddexp(np.log(_RHO), a[1:])])
    weight = np.concatenate([[1.0], special.expit(a[1:] - np.log(_RHO))])
    return np.cumsum(steps), np.tril(np.broadcast_to(weight, (a.size, a.size)))


def _theta(r: FloatArray, tau: FloatArray, ref: float | None) -> FloatArray:
    ratio = tau[1:] / tau[:-1]
    gaps = np.log(np.maximum(ratio - _RHO, 1e-6))
    head = np.concatenate([np.log(r), np.log(tau[:1]), gaps])
    return head if ref is None else np.append(head, ref)


def _unpack(prob: _Problem, theta: FloatArray, order: int) -> tuple[FloatArray, ...]:
    """R, tau, d ln tau / d a, and T_ref (as a (1,) array) from the parameter vector."""
    r = np.exp(theta[:order])
    ln_tau, dtau = _tau_transform(theta[order : 2 * order])
    ref = theta[2 * order :] if prob.reference_temp_c is None else np.array([prob.reference_temp_c])
    return r, np.exp(ln_tau), dtau, ref


def _residual(prob: _Problem, theta: FloatArray, order: int) -> FloatArray:
    r, tau, _, ref = _unpack(prob, theta, order)
    return np.asarray(ref[0] + prob.power_w * (prob.shape(tau) @ r) - prob.temp_c)


def _jacobian(prob: _Problem, theta: FloatArray, order: int) -> FloatArray:
    r, tau, dtau, _ = _unpack(prob, theta, order)
    x = prob.t_s[:, None] / tau[None, :]
    d_ln_r = prob.power_w * prob.shape(tau) * r
    # d/d ln tau of exp(-t/tau) is x exp(-x); of 1 - exp(-t/tau) it is -x exp(-x)
    d_ln_tau = (1.0 if prob.cooling else -1.0) * prob.power_w * r * x * np.exp(-x)
    cols = [d_ln_r, d_ln_tau @ dtau]
    if prob.reference_temp_c is None:
        cols.append(np.ones((prob.t_s.size, 1)))
    return np.hstack(cols)


def _linear_start(prob: _Problem, tau: FloatArray) -> tuple[FloatArray, float | None]:
    """R >= 0 (and T_ref) by bounded linear least squares for fixed time constants."""
    a = prob.power_w * prob.shape(tau)
    y = prob.temp_c.copy()
    lower = np.zeros(tau.size)
    if prob.reference_temp_c is None:
        a = np.hstack([a, np.ones((y.size, 1))])
        lower = np.append(lower, -np.inf)
    else:
        y -= prob.reference_temp_c
    sol = optimize.lsq_linear(a, y, bounds=(lower, np.inf)).x
    span = float(np.ptp(prob.temp_c)) / prob.power_w
    r = np.maximum(sol[: tau.size], 1e-3 * max(float(sol[: tau.size].sum()), span) / tau.size)
    return r, (float(sol[-1]) if prob.reference_temp_c is None else None)


def _starts(t_lo: float, t_hi: float, order: int, previous: FloatArray | None) -> list[FloatArray]:
    """Time-constant start vectors (each ascending) for one order."""
    lo, hi = np.log(t_lo), np.log(t_hi)
    starts = [np.exp(lo + (hi - lo) * (np.arange(order) + off) / order) for off in _OFFSETS]
    if previous is not None:
        edges = np.concatenate([[previous[0] / 3.0], previous, [previous[-1] * 3.0]])
        inserted = np.sqrt(edges[:-1] * edges[1:])  # before, between and after the stages
        starts += [np.sort(np.append(previous, tau)) for tau in inserted]
    return starts


def _fit_order(
    prob: _Problem, order: int, previous: FloatArray | None, t_lo: float, t_hi: float
) -> OrderFit:
    n = prob.t_s.size
    fitted_ref = prob.reference_temp_c is None
    n_params = 2 * order + int(fitted_ref)
    lower = np.concatenate(
        [
            np.full(order, -_LN_R_BOUND),
            [np.log(t_lo) - _LN_TAU_MARGIN],
            np.full(order - 1, -_GAP_BOUND),
            [-np.inf] if fitted_ref else [],
        ]
    )
    upper = np.concatenate(
        [
            np.full(order, _LN_R_BOUND),
            [np.log(t_hi) + _LN_TAU_MARGIN],
            np.full(order - 1, _GAP_BOUND),
            [np.inf] if fitted_ref else [],
        ]
    )

    def solve(tau0: FloatArray) -> optimize.OptimizeResult:
        r0, ref0 = _linear_start(prob, tau0)
        return optimize.least_squares(
            lambda th: _residual(prob, th, order),
            np.clip(_theta(r0, tau0, ref0), lower + 1e-9, upper - 1e-9),
            jac=lambda th: _jacobian(prob, th, order),
            bounds=(lower, upper),
            method="trf",
            x_scale="jac",
            max_nfev=_MAX_NFEV,
        )

    runs = [solve(tau0) for tau0 in _starts(t_lo, t_hi, order, previous)]
    best = max(runs, key=lambda res: (bool(res.success), -float(res.cost)))
    r, tau, dtau, ref = _unpack(prob, best.x, order)
    resid = _residual(prob, best.x, order)
    rss = float(resid @ resid)
    floor = n * (np.finfo(np.float64).eps * float(np.max(np.abs(prob.temp_c)))) ** 2
    bic = n * np.log(max(rss, floor) / n) + n_params * np.log(n)

    jac = _jacobian(prob, best.x, order)
    _, sing, vt = np.linalg.svd(jac, full_matrices=False)
    ci_valid = bool(sing[-1] > _RCOND * sing[0])
    z = float(special.ndtri(0.5 + _CONFIDENCE / 2.0))  # standard normal quantile
    total = float(r.sum())
    if ci_valid:
        cov = rss / (n - n_params) * (vt.T / sing**2) @ vt
        cov_ln_r = cov[:order, :order]
        se_ln_r = np.sqrt(np.diag(cov_ln_r))
        cov_a = cov[order : 2 * order, order : 2 * order]
        se_ln_tau = np.sqrt(np.diag(dtau @ cov_a @ dtau.T))
        se_ln_total = float(np.sqrt(r @ cov_ln_r @ r)) / total  # d ln(sum R) / d ln R_i = R_i/sum
        se_ref = float(np.sqrt(cov[-1, -1])) if fitted_ref else np.nan
    else:
        se_ln_r = se_ln_tau = np.full(order, np.nan)
        se_ln_total = se_ref = np.nan
    spread = np.array([-z, z])
    with np.errstate(over="ignore"):  # an interval too wide for a float reaches inf
        r_ci = r[:, None] * np.exp(se_ln_r[:, None] * spread)
        tau_ci = tau[:, None] * np.exp(se_ln_tau[:, None] * spread)
        total_ci = total * np.exp(se_ln_total * spread)
    return OrderFit(
        order=order,
        stages=FosterStages(r, tau),
        reference_temp_c=float(ref[0]),
        r_ci_k_per_w=r_ci,
        tau_ci_s=tau_ci,
        total_r_k_per_w=total,
        total_r_ci_k_per_w=total_ci,
        settled=bool(prob.t_s[-1] >= SETTLED_TAUS * tau[-1]),
        reference_temp_ci_c=float(ref[0]) + z * se_ref * np.array([-1.0, 1.0]),
        ci_valid=ci_valid,
        rms_k=float(np.sqrt(rss / n)),
        bic=float(bic),
        n_params=n_params,
        converged=bool(best.success),
        message=str(best.message),
    )


def fit_foster(
    t_s: npt.ArrayLike,
    temp_c: npt.ArrayLike,
    power_w: float,
    *,
    orders: Sequence[int] = (1, 2, 3, 4),
    cooling: bool = False,
    reference_temp_c: float | None = None,
    location: Location = "junction",
) -> CalibrationResult:
    """Fit Foster networks of each order to a heating (or cooling) curve; choose by BIC.

    t_s: (n,) strictly increasing times since the power step, s, >= 0; temp_c: (n,) recorded
    temperature, degC; power_w > 0: the power step, W; orders: distinct stage counts >= 1
    (an order needs ``MIN_POINTS_PER_PARAM`` samples per fitted parameter or is skipped);
    cooling: the curve follows the removal of ``power_w`` from equilibrium;
    reference_temp_c: T_ref if known (the temperature before a heating step or
    after a cooling one), else fitted; location: "junction" or "sensor" (module docstring).
    ValueError names a bad argument (:class:`WrongDirection` for a curve going the wrong way);
    :class:`CalibrationFailed` if no order converges.

    >>> truth = FosterStages(np.array([0.4, 1.2]), np.array([0.05, 2.0]))
    >>> t = np.logspace(-3, 1.5, 200)
    >>> noise = np.random.default_rng(0).normal(0.0, 0.02, t.size)
    >>> temp = 25.0 + 10.0 * truth.zth_k_per_w(t) + noise
    >>> cal = fit_foster(t, temp, 10.0, orders=(1, 2, 3))
    >>> cal.order, np.round(cal.stages.r_k_per_w, 2), np.round(cal.stages.tau_s, 2)
    (2, array([0.4, 1.2]), array([0.05, 2.  ]))
    >>> [round(f.rms_k, 3) for f in cal.fits]  # noise is 0.02 K
    [0.939, 0.019, 0.019]
    """
    t = np.asarray(t_s, dtype=np.float64)
    temp = np.asarray(temp_c, dtype=np.float64)
    if t.ndim != 1 or t.size < 2 or not np.all(np.isfinite(t)):
        raise ValueError("t_s must be a finite array of shape (n,) with n >= 2")
    if t[0] < 0.0 or np.any(np.diff(t) <= 0.0):
        raise ValueError("t_s must be >= 0 (time since the power step) and strictly increasing")
    if temp.shape != t.shape or not np.all(np.isfinite(temp)):
        raise ValueError("temp_c must be finite with the shape of t_s")
    if not (np.isfinite(power_w) and power_w > 0.0):
        raise ValueError("power_w must be finite and > 0")
    order_list = [int(k) for k in orders]
    if not order_list or min(order_list) < 1 or len(set(order_list)) != len(order_list):
        raise ValueError("orders must be distinct stage counts >= 1")
    if reference_temp_c is not None and not np.isfinite(reference_temp_c):
        raise ValueError("reference_temp_c must be finite (or None to fit it)")
    if location not in ("junction", "sensor"):
        raise ValueError("location must be 'junction' or 'sensor'")
    fitted_ref = reference_temp_c is None

    def enough(order: int, *, free_ref: bool = fitted_ref) -> bool:
        return t.size >= MIN_POINTS_PER_PARAM * (2 * order + int(free_ref))

    tried = [k for k in order_list if enough(k)]
    if not tried:
        need = MIN_POINTS_PER_PARAM * (2 * min(order_list) + int(fitted_ref))
        raise ValueError(
            f"t_s: {t.size} samples fit no order: order {min(order_list)} needs {need} "
            f"({MIN_POINTS_PER_PARAM} per fitted parameter)"
        )
    positive = t[t > 0.0]
    if positive.size == 0 or positive[0] == t[-1]:
        raise ValueError("t_s must span an interval of positive times")
    _check_direction(temp, cooling=bool(cooling))
    prob = _Problem(
        t,
        temp,
        float(power_w),
        bool(cooling),
        None if reference_temp_c is None else float(reference_temp_c),
    )
    t_lo, t_hi = float(positive[0]), float(t[-1])
    fits: list[OrderFit] = []
    previous: dict[int, FloatArray] = {}
    for order in sorted(tried):
        fit = _fit_order(prob, order, previous.get(order - 1), t_lo, t_hi)
        previous[order] = fit.stages.tau_s
        fits.append(fit)
    by_order = {f.order: f for f in fits}
    reported = tuple(by_order[k] for k in order_list if k in by_order)
    converged = [f for f in reported if f.converged]
    if not converged:
        raise CalibrationFailed("no model order converged; see .fits", reported)
    best = min(converged, key=lambda f: f.bic)
    warnings: list[str] = []
    offset, offset_ci = float("nan"), (float("nan"), float("nan"))
    if not fitted_ref:
        # the same order selection with T_ref free: its T_ref estimates the offset
        free_prob = replace(prob, reference_temp_c=None)
        free_fits: list[OrderFit] = []
        for order in sorted(k for k in tried if enough(k, free_ref=True)):
            prior = free_fits[-1].stages.tau_s if free_fits else None
            free_fits.append(_fit_order(free_prob, order, prior, t_lo, t_hi))
        usable = [f for f in free_fits if f.converged and f.ci_valid]
        if usable:
            free = min(usable, key=lambda f: f.bic)
            given = float(prob.reference_temp_c or 0.0)
            offset = free.reference_temp_c - given
            lo, hi = (float(x) - given for x in free.reference_temp_ci_c)
            offset_ci = (lo, hi)
            if not lo <= 0.0 <= hi:
                warnings.append(
                    f"the curve suggests a reference temperature of {free.reference_temp_c:.2f} "
                    f"degC, {offset:+.2f} K from the {given:g} degC given (95 % interval "
                    f"{lo:+.2f} .. {hi:+.2f} K): check it, or leave it out to fit it"
                )
    if best.stages.tau_s[0] < t_lo:
        warnings.append(
            f"the fastest stage (tau {best.stages.tau_s[0]:.3g} s) is faster than the first "
            f"sample after the step ({t_lo:.3g} s): usually a reference temperature off by "
            f"{power_w * best.stages.r_k_per_w[0]:.2f} K, not a real stage"
        )
    if t_hi > LONG_RECORD_S:
        warnings.append(
            f"the record lasts {t_hi:.4g} s (over {LONG_RECORD_S / 3600:g} h): were the times "
            "sent in milliseconds? t_s is in seconds"
        )
    if not best.settled:
        warnings.append(
            f"not settled: the curve ends at {t_hi:.4g} s, before {SETTLED_TAUS:g} x the slowest "
            f"time constant ({best.stages.tau_s[-1]:.4g} s); the total thermal resistance is "
            "an extrapolation"
        )
    return CalibrationResult(
        stages=best.stages,
        order=best.order,
        reference_temp_c=best.reference_temp_c,
        fits=reported,
        location=location,
        cooling=bool(cooling),
        power_w=float(power_w),
        skipped_orders=tuple(k for k in order_list if k not in by_order),
        warnings=tuple(warnings),
        reference_offset_k=offset,
        reference_offset_ci_k=offset_ci,
    )


def _check_direction(temp: FloatArray, *, cooling: bool) -> None:
    """Refuse a curve that does not go the stated way (module docstring, direction)."""
    q = max(2, temp.size // 4)
    change = float(np.mean(temp[-q:]) - np.mean(temp[:q]))
    noise = 1.4826 * float(np.median(np.abs(np.diff(temp)))) / np.sqrt(2.0)  # MAD estimate
    if (-change if cooling else change) > 2.0 * noise * np.sqrt(2.0 / q):
        return
    way, other = ("fall", "heating") if cooling else ("rise", "cooling")
    hint = (
        f"; it looks like a {other} curve" if abs(change) > 2.0 * noise * np.sqrt(2.0 / q) else ""
    )
    raise WrongDirection(
        f"temp_c: a {'cooling' if cooling else 'heating'} curve must {way} (its last quarter "
        f"against its first moved {change:+.3g} K){hint}: check cooling and the curve"
    )
