"""Mission reliability of a rail that keeps running while at least k of its n phases survive.

Model
-----
* Per-phase failure rate: a FIT value (failures per 1e9 device-hours) stated at a reference
  temperature, accelerated to the phase's junction temperature by the Arrhenius factor
  AF = exp(Ea/k_B (1/T_ref - 1/T)) with absolute temperatures (the JEDEC JEP122 model; the
  activation energy Ea depends on the failure mechanism and is a parameter).
* Constant hazard: a phase's life is exponential, so its survival over t hours is
  exp(-lambda t). This is the useful-life part of the bathtub curve; infant mortality and
  wear-out are outside the model.
* Phases fail independently. The rail survives while at least k phases survive; the number
  of survivors of phases with different survival probabilities follows the Poisson-binomial
  distribution, computed exactly by a recursion over the phases (one convolution with
  [1 - p_j, p_j] per phase, vectorised over every case at once). With equal probabilities it
  is the binomial distribution.

Batches: per-phase arrays have shape (..., n_phases); leading axes are cases (for example the
present state plus each N-1 case). A phase that is already out has survival probability 0 (or
failure rate ``np.inf``). ``k`` broadcasts against the leading axes.

Failure policy: invalid arguments raise ValueError naming the argument; a quantity that would
overflow float64 raises OverflowError; an integral that misses its tolerance raises
ArithmeticError. No silent NaN.
"""

import numpy as np
import numpy.typing as npt
from scipy import integrate

from phaseward.physics.constants import BOLTZMANN_EV_PER_K, DEVICE_HOURS_PER_FIT, ZERO_CELSIUS_K

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]

_MAX_EXPONENT = 700.0  # largest exponent float64 holds with room to spare (e^709 max)


def _real(name: str, value: npt.ArrayLike) -> FloatArray:
    """``value`` as float64; ValueError naming ``name`` if it holds NaN or an infinity."""
    arr = np.asarray(value, dtype=np.float64)
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite")
    return arr


def _kelvin(name: str, temp_c: npt.ArrayLike) -> FloatArray:
    """Temperature in degC converted to K; ValueError unless finite and above absolute zero."""
    temp_k = _real(name, temp_c) + ZERO_CELSIUS_K
    if not np.all(temp_k > 0.0):
        raise ValueError(f"{name} must be above absolute zero (-273.15 degC)")
    return np.asarray(temp_k)


def _per_phase(name: str, value: npt.ArrayLike) -> FloatArray:
    """A per-phase array of shape (..., n_phases) as float64; ValueError if it is a scalar."""
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == 0:
        raise ValueError(f"{name} must have shape (..., n_phases)")
    return arr


def _probabilities(p_survive: npt.ArrayLike) -> FloatArray:
    """Survival probabilities (..., n_phases) in [0, 1]; ValueError naming ``p_survive``."""
    p = _per_phase("p_survive", p_survive)
    if not np.all((p >= 0.0) & (p <= 1.0)):
        raise ValueError("p_survive must lie in [0, 1]")
    return p


def _rates(rates_per_h: npt.ArrayLike) -> FloatArray:
    """Failure rates (..., n_phases) >= 0 in 1/h, ``np.inf`` allowed; ValueError otherwise."""
    rates = _per_phase("rates_per_h", rates_per_h)
    if not np.all(rates >= 0.0):  # also False for NaN
        raise ValueError("rates_per_h must be >= 0 (np.inf for a phase that is already out)")
    return rates


def _count(k: npt.ArrayLike) -> IntArray:
    """Required number of surviving phases as an integer array >= 0; ValueError naming ``k``."""
    arr = np.asarray(k)
    if arr.dtype.kind not in "iu":
        raise ValueError("k must be an integer or an integer array")
    if not np.all(arr >= 0):
        raise ValueError("k must be >= 0")
    return arr.astype(np.intp)


def _cases(lead: tuple[int, ...], k: IntArray) -> tuple[int, ...]:
    """Broadcast case shape of per-phase leading axes ``lead`` and ``k``; ValueError naming k."""
    try:
        return np.broadcast_shapes(lead, k.shape)
    except ValueError:
        raise ValueError(f"k of shape {k.shape} does not broadcast against cases {lead}") from None


def arrhenius_factor(
    temp_c: npt.ArrayLike, *, ref_temp_c: npt.ArrayLike, activation_ev: npt.ArrayLike
) -> FloatArray:
    """Arrhenius acceleration factor AF = exp(Ea/k_B (1/T_ref - 1/T)), dimensionless.

    JEDEC JEP122 model with ``activation_ev`` = Ea in eV and k_B in eV/K (CODATA via
    scipy.constants); temperatures in degC are converted to kelvin. AF > 1 above the
    reference temperature. Arguments broadcast; the result has the broadcast shape.
    OverflowError if AF would not fit in float64 (only for absurd temperatures).

    >>> print(f"{arrhenius_factor(125.0, ref_temp_c=25.0, activation_ev=0.7):.1f}")
    937.3
    >>> np.round(arrhenius_factor([25.0, 55.0, 85.0], ref_temp_c=55.0, activation_ev=0.7), 4)
    array([0.0828, 1.    , 7.9528])
    """
    temp_k = _kelvin("temp_c", temp_c)
    ref_k = _kelvin("ref_temp_c", ref_temp_c)
    ea = _real("activation_ev", activation_ev)
    if not np.all(ea >= 0.0):
        raise ValueError("activation_ev must be >= 0")
    exponent = ea / BOLTZMANN_EV_PER_K * (1.0 / ref_k - 1.0 / temp_k)
    if np.any(exponent > _MAX_EXPONENT):
        raise OverflowError("arrhenius_factor overflows float64: temperatures too far apart")
    return np.asarray(np.exp(exponent), dtype=np.float64)


def failure_rate_per_h(
    fit_at_ref: npt.ArrayLike,
    temp_c: npt.ArrayLike,
    *,
    ref_temp_c: npt.ArrayLike,
    activation_ev: npt.ArrayLike,
) -> FloatArray:
    """Failure rate lambda in 1/h at ``temp_c``: FIT x 1e-9 x AF (see :func:`arrhenius_factor`).

    ``fit_at_ref`` >= 0 is the rate in FIT (failures per 1e9 device-hours) at ``ref_temp_c``.
    Arguments broadcast, e.g. fit (n_phases,) against temperatures (n_cases, n_phases).

    >>> lam = failure_rate_per_h(50.0, [55.0, 105.0], ref_temp_c=55.0, activation_ev=0.7)
    >>> [f"{x:.3e}" for x in lam]
    ['5.000e-08', '1.320e-06']
    """
    fit = _real("fit_at_ref", fit_at_ref)
    if not np.all(fit >= 0.0):
        raise ValueError("fit_at_ref must be >= 0")
    af = arrhenius_factor(temp_c, ref_temp_c=ref_temp_c, activation_ev=activation_ev)
    return np.asarray(fit / DEVICE_HOURS_PER_FIT * af, dtype=np.float64)


def survival_probability(rate_per_h: npt.ArrayLike, hours: npt.ArrayLike) -> FloatArray:
    """Probability exp(-lambda t) that a phase with constant hazard survives ``hours``.

    Constant hazard means an exponential life (no wear-out). ``rate_per_h`` >= 0 in 1/h,
    ``np.inf`` for a phase that is already out (probability 0 even at t = 0); ``hours`` >= 0.
    Arguments broadcast.

    >>> np.round(survival_probability([1e-6, np.inf], 8760.0), 6)
    array([0.991278, 0.      ])
    """
    rate = np.asarray(rate_per_h, dtype=np.float64)
    if not np.all(rate >= 0.0):
        raise ValueError("rate_per_h must be >= 0 (np.inf for a phase that is already out)")
    t = _real("hours", hours)
    if not np.all(t >= 0.0):
        raise ValueError("hours must be >= 0")
    out = np.isinf(rate)
    return np.asarray(np.where(out, 0.0, np.exp(-np.where(out, 0.0, rate) * t)))


def poisson_binomial_pmf(p_survive: npt.ArrayLike) -> FloatArray:
    """Distribution of the number of surviving phases, (..., n_phases + 1).

    Entry m is the probability that exactly m of the n independent phases survive, for
    per-phase survival probabilities ``p_survive`` (..., n_phases) in [0, 1] (Poisson-binomial
    distribution). Exact recursion over the phases: after phase j the distribution is the
    previous one convolved with [1 - p_j, p_j]; every case of the batch in one step. Each
    step forms convex combinations of non-negative numbers, so there is no cancellation.

    >>> np.round(poisson_binomial_pmf([0.9, 0.8, 0.5]), 3)
    array([0.01, 0.14, 0.49, 0.36])
    >>> poisson_binomial_pmf(np.full((4, 6), 0.5)).shape
    (4, 7)
    """
    p = _probabilities(p_survive)
    n = p.shape[-1]
    pmf = np.zeros((*p.shape[:-1], n + 1))
    pmf[..., 0] = 1.0
    for j in range(n):  # a loop over phases, never over cases
        pj = p[..., j : j + 1]
        pmf[..., 1 : j + 2] = pmf[..., 1 : j + 2] * (1.0 - pj) + pmf[..., : j + 1] * pj
        pmf[..., 0] *= 1.0 - p[..., j]
    return pmf


def _at_least(p: FloatArray, k: IntArray) -> FloatArray:
    """P(at least k survivors) for validated p (..., n) and k broadcasting over the cases."""
    pmf = poisson_binomial_pmf(p)
    n = p.shape[-1]
    tail = np.zeros((*pmf.shape[:-1], n + 2))  # tail[m] = P(X >= m), m = 0..n+1
    tail[..., : n + 1] = np.minimum(np.cumsum(pmf[..., ::-1], axis=-1)[..., ::-1], 1.0)
    batch = _cases(p.shape[:-1], k)
    index = np.broadcast_to(np.minimum(k, n + 1), batch)[..., None]
    tail = np.broadcast_to(tail, (*batch, n + 2))
    return np.asarray(np.take_along_axis(tail, index, axis=-1)[..., 0])


def k_out_of_n_survival(p_survive: npt.ArrayLike, k: npt.ArrayLike) -> FloatArray:
    """Probability that at least ``k`` of n independent phases survive.

    ``p_survive``: (..., n_phases) per-phase survival probabilities in [0, 1] (they may
    differ: the exact Poisson-binomial tail, see :func:`poisson_binomial_pmf`). ``k``: integer
    >= 0 or integer array broadcasting against the leading axes; k = 0 gives 1 and k > n gives
    0 (the rail needs more phases than it has). Result: broadcast of ``p_survive.shape[:-1]``
    and ``k.shape``.

    >>> print(f"{k_out_of_n_survival([0.9, 0.9, 0.9], 2):.3f}")  # 3 p^2 - 2 p^3
    0.972
    >>> p = np.array([[0.99] * 4, [0.99, 0.99, 0.99, 0.0]])  # all phases; phase 3 out
    >>> np.round(k_out_of_n_survival(p, 3), 6)
    array([0.999408, 0.970299])
    """
    return _at_least(_probabilities(p_survive), _count(k))


def mean_time_to_failure_h(
    rates_per_h: npt.ArrayLike, k: npt.ArrayLike, *, rtol: float = 1e-10
) -> FloatArray:
    """MTTF in hours of a k-out-of-n rail of independent phases with constant failure rates.

    MTTF = integral over t from 0 to infinity of R_sys(t), with R_sys(t) the probability that
    at least k phases survive when phase i survives with exp(-lambda_i t). For identical rates
    this is sum_{i=k}^{n} 1/(i lambda) (Rausand and Hoyland, *System Reliability Theory*, from
    memory; tests/reference checks it against scipy.integrate.quad); for different rates R_sys
    is a sum of exponentials over survivor subsets (exponential in n), so the integral is
    computed numerically:

    * time is scaled per case by lambda_ref, the sum of the k smallest rates. R_sys(t) >=
      exp(-lambda_ref t) (the k most reliable phases all survive), so the scaled integral is
      >= 1, and R_sys decays as exp(-lambda_ref t) for large t, so the scaled integrand
      decays like exp(-s) on [0, inf);
    * ``scipy.integrate.quad_vec`` (adaptive Gauss-Kronrod, QUADPACK-style global error
      control) integrates all cases together as one vector-valued integrand, with the
      max-norm absolute tolerance ``rtol`` on the scaled integrals; since each is >= 1,
      every case meets the relative tolerance ``rtol`` by the integrator's error estimate.
      ArithmeticError if it does not converge (``rtol`` below about 1e-13 cannot be met).

    ``rates_per_h``: (..., n_phases) >= 0 in 1/h, ``np.inf`` for a phase that is already out;
    ``k``: integer >= 0 or integer array broadcasting against the leading axes. Returns the
    broadcast case shape: ``np.inf`` if the k most reliable phases never fail (k = 0, or zero
    rates) and 0 if fewer than k phases are left.

    >>> print(f"{mean_time_to_failure_h([1e-5, 1e-5, 1e-5], 2):.2f}")  # 5 / (6 lambda)
    83333.33
    >>> np.round(mean_time_to_failure_h([[1e-5, 2e-5, 4e-5], [1e-5, 2e-5, np.inf]], 2), 1)
    array([41428.6, 33333.3])
    """
    rates = _rates(rates_per_h)
    need = _count(k)
    tol = float(_real("rtol", rtol))
    if not tol > 0.0:
        raise ValueError("rtol must be > 0")
    n = rates.shape[-1]
    batch = _cases(rates.shape[:-1], need)
    rates_b = np.broadcast_to(rates, (*batch, n)).reshape(-1, n)
    need_b = np.broadcast_to(need, batch).reshape(-1)
    cum = np.zeros((rates_b.shape[0], n + 2))
    cum[:, 1 : n + 1] = np.cumsum(np.sort(rates_b, axis=-1), axis=-1)
    cum[:, n + 1] = np.inf  # more survivors than phases: the rail is already down
    rate_ref = np.take_along_axis(cum, np.minimum(need_b, n + 1)[:, None], axis=-1)[:, 0]
    mttf = np.where(rate_ref == 0.0, np.inf, 0.0)
    todo = np.flatnonzero((rate_ref > 0.0) & np.isfinite(rate_ref))
    if todo.size:
        scaled = rates_b[todo] / rate_ref[todo, None]  # rates per unit of scaled time s
        lost = np.isinf(scaled)
        alive = np.where(lost, 0.0, scaled)
        need_todo = need_b[todo]

        def reliability(s: float) -> FloatArray:
            p = np.where(lost, 0.0, np.exp(-alive * s))
            return _at_least(p, need_todo)

        integral, error, info = integrate.quad_vec(
            reliability, 0.0, np.inf, epsabs=tol, epsrel=0.0, norm="max", full_output=True
        )
        if not info.success or not error <= tol:
            raise ArithmeticError(
                f"MTTF integral missed rtol={tol:g} (error estimate {error:.3g}): {info.message}"
            )
        mttf[todo] = integral / rate_ref[todo]
    return np.asarray(mttf.reshape(batch))
