"""Stress on a phase's hot-swap pass MOSFET while its breaker limits a downstream short.

During a short the breaker's controller holds the fault current at its limit I_lim until the
breaker delay runs out. The output is shorted, so the pass MOSFET sees the full input voltage
and dissipates P = V_in x I_lim for the whole delay. Two checks decide whether it survives:

* thermal: one rectangular power pulse from thermal equilibrium raises the junction by
  P x Zth(t_delay) (Zth as in the JEDEC JESD51 series, e.g. measured by the JESD51-14
  transient method and fitted as a Foster model, see :class:`thermal.FosterStages`); the
  peak must stay at or below the junction limit (margin in K);
* SOA: the datasheet's safe-operating-area line at that input voltage, given as points
  (single-pulse duration, allowed drain current), interpolated linearly in log-log
  coordinates as the datasheet draws it (a power law between neighbouring points); the
  limited current must not exceed the allowed current for the delay (margin in A). The
  points are taken as given: derating them for case temperature is the caller's choice.
  Durations shorter than the first point use the first point's current (conservative: an
  SOA line never allows less current for a shorter pulse). Durations longer than the last
  point are outside the SOA data: the check cannot be made, so the delay does not pass
  (``within_soa_data`` False, SOA values NaN).

Failure policy: invalid arguments raise ValueError naming the argument; NaN appears only
behind the ``within_soa_data`` flag.
"""

from dataclasses import dataclass
from typing import Literal, cast

import numpy as np
import numpy.typing as npt

from phaseward.physics.thermal import FosterStages, bracketed_root

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]
StrArray = npt.NDArray[np.str_]

Binding = Literal["thermal", "soa", "none"]

_LOG_ATOL = 1e-12  # root tolerance on ln(delay): the delay to a relative 1e-12


@dataclass(frozen=True, eq=False)
class BreakerStress:
    """Outcome of one breaker delay.

    peak_junction_c: junction temperature at the end of the pulse, degC; rise_k: its rise
    over the start temperature, K; margin_k: junction limit minus peak, K (negative: fails);
    soa_allowed_a: allowed current for the delay, A; soa_margin_a: allowed minus limited
    current, A (negative: fails); both SOA values NaN when ``within_soa_data`` is False.
    passes: both checks pass (a margin of exactly 0 passes). binding: "none" if it passes,
    else the failing check; when both fail, the one exceeded by the larger factor (rise over
    the available headroom against current over the allowed current; a thermal failure
    outranks a delay outside the SOA data).
    """

    peak_junction_c: float
    rise_k: float
    margin_k: float
    soa_allowed_a: float
    soa_margin_a: float
    passes: bool
    binding: Binding
    within_soa_data: bool


@dataclass(frozen=True, eq=False)
class StressCurve:
    """:class:`BreakerStress` fields as arrays of the shape of ``delay_s``."""

    delay_s: FloatArray
    peak_junction_c: FloatArray
    rise_k: FloatArray
    margin_k: FloatArray
    soa_allowed_a: FloatArray
    soa_margin_a: FloatArray
    passes: BoolArray
    binding: StrArray
    within_soa_data: BoolArray


def _scalar(name: str, value: float, *, positive: bool = False) -> float:
    """``value`` as a float; ValueError naming ``name`` unless finite (and > 0)."""
    x = float(value)
    if not np.isfinite(x) or (positive and not x > 0.0):
        raise ValueError(f"{name} must be finite{' and > 0' if positive else ''}")
    return x


@dataclass(frozen=True, eq=False)
class _Breaker:
    """Validated inputs of one breaker and its pass MOSFET (see :func:`breaker_stress`)."""

    power_w: float
    current_limit_a: float
    foster: FosterStages
    start_temp_c: float
    junction_limit_c: float
    soa_time_s: FloatArray
    soa_current_a: FloatArray

    @classmethod
    def build(
        cls,
        *,
        vin_v: float,
        current_limit_a: float,
        foster: FosterStages,
        start_temp_c: float,
        junction_limit_c: float,
        soa_time_s: npt.ArrayLike,
        soa_current_a: npt.ArrayLike,
    ) -> "_Breaker":
        vin = _scalar("vin_v", vin_v, positive=True)
        limit_a = _scalar("current_limit_a", current_limit_a, positive=True)
        if not isinstance(foster, FosterStages):
            raise ValueError("foster must be a FosterStages model")
        times = np.asarray(soa_time_s, dtype=np.float64)
        currents = np.asarray(soa_current_a, dtype=np.float64)
        if times.ndim != 1 or times.size == 0:
            raise ValueError("soa_time_s must have shape (n_points,) with n_points >= 1")
        if not np.all(np.isfinite(times) & (times > 0.0)) or np.any(np.diff(times) <= 0.0):
            raise ValueError("soa_time_s must be finite, > 0 and strictly increasing")
        if currents.shape != times.shape:
            raise ValueError("soa_current_a must have the shape of soa_time_s")
        if not np.all(np.isfinite(currents) & (currents > 0.0)) or np.any(np.diff(currents) > 0):
            raise ValueError("soa_current_a must be finite, > 0 and decreasing or flat")
        return cls(
            power_w=vin * limit_a,
            current_limit_a=limit_a,
            foster=foster,
            start_temp_c=_scalar("start_temp_c", start_temp_c),
            junction_limit_c=_scalar("junction_limit_c", junction_limit_c),
            soa_time_s=times,
            soa_current_a=currents,
        )

    def soa_allowed_a(self, delay_s: FloatArray) -> FloatArray:
        """SOA current for delays up to the last point, log-log linear between the points.

        On segment j the line is the power law I_j (t / t_j)^s_j, s_j = ln(I_j+1 / I_j) /
        ln(t_j+1 / t_j), so a tabulated point returns its own current exactly; delays below
        the first point get the first point's current.
        """
        t, i = self.soa_time_s, self.soa_current_a
        slope = np.append(np.log(i[1:] / i[:-1]) / np.log(t[1:] / t[:-1]), 0.0)
        d = np.clip(delay_s, t[0], t[-1])
        j = np.clip(np.searchsorted(t, d, side="right") - 1, 0, t.size - 1)
        return np.asarray(i[j] * (d / t[j]) ** slope[j])

    def curve(self, delay_s: FloatArray) -> StressCurve:
        """Both checks at every delay (any shape, > 0)."""
        rise = self.power_w * self.foster.zth_k_per_w(delay_s)
        headroom = self.junction_limit_c - self.start_temp_c
        margin = headroom - rise
        within = delay_s <= self.soa_time_s[-1]
        allowed = np.where(within, self.soa_allowed_a(delay_s), np.nan)
        soa_margin = allowed - self.current_limit_a
        thermal_fails = margin < 0.0
        soa_fails = ~within | (soa_margin < 0.0)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # inf: far over
            thermal_use = np.where(headroom > 0.0, rise / headroom, np.inf)
            soa_use = np.where(within, self.current_limit_a / allowed, -np.inf)
        thermal_binds = thermal_fails & (~soa_fails | (thermal_use >= soa_use))
        binding = np.where(thermal_binds, "thermal", np.where(soa_fails, "soa", "none"))
        return StressCurve(
            delay_s=delay_s,
            peak_junction_c=self.start_temp_c + rise,
            rise_k=rise,
            margin_k=margin,
            soa_allowed_a=allowed,
            soa_margin_a=soa_margin,
            passes=~thermal_fails & ~soa_fails,
            binding=binding,
            within_soa_data=within,
        )


def _delays(delay_s: npt.ArrayLike) -> FloatArray:
    """Breaker delays as float64; ValueError naming ``delay_s`` unless finite and > 0."""
    delay = np.asarray(delay_s, dtype=np.float64)
    if not np.all(np.isfinite(delay) & (delay > 0.0)):
        raise ValueError("delay_s must be finite and > 0")
    return delay


def stress_curve(
    *,
    vin_v: float,
    current_limit_a: float,
    delay_s: npt.ArrayLike,
    foster: FosterStages,
    start_temp_c: float,
    junction_limit_c: float,
    soa_time_s: npt.ArrayLike,
    soa_current_a: npt.ArrayLike,
) -> StressCurve:
    """:func:`breaker_stress` for every delay in ``delay_s`` (any shape, s) in one call.

    Every field of the result has the shape of ``delay_s`` (for a plot or a table).

    >>> f = FosterStages(np.array([0.05, 0.4]), np.array([1e-4, 5e-3]))
    >>> c = stress_curve(vin_v=12.0, current_limit_a=20.0, delay_s=[1e-4, 1e-3, 1e-2, 0.1],
    ...                  foster=f, start_temp_c=50.0, junction_limit_c=150.0,
    ...                  soa_time_s=[1e-4, 1e-3, 1e-2], soa_current_a=[100.0, 40.0, 15.0])
    >>> np.round(c.margin_k, 1), np.round(c.soa_margin_a, 1)
    (array([90.5, 70.6,  5. , -8. ]), array([80., 20., -5., nan]))
    >>> c.passes.tolist(), c.binding.tolist()
    ([True, True, False, False], ['none', 'none', 'soa', 'thermal'])
    """
    breaker = _Breaker.build(
        vin_v=vin_v,
        current_limit_a=current_limit_a,
        foster=foster,
        start_temp_c=start_temp_c,
        junction_limit_c=junction_limit_c,
        soa_time_s=soa_time_s,
        soa_current_a=soa_current_a,
    )
    return breaker.curve(_delays(delay_s))


def breaker_stress(
    *,
    vin_v: float,
    current_limit_a: float,
    delay_s: float,
    foster: FosterStages,
    start_temp_c: float,
    junction_limit_c: float,
    soa_time_s: npt.ArrayLike,
    soa_current_a: npt.ArrayLike,
) -> BreakerStress:
    """Thermal and SOA check of the pass MOSFET for one breaker delay during a short.

    P = ``vin_v`` x ``current_limit_a`` (V x A) for ``delay_s`` seconds; peak junction =
    ``start_temp_c`` + P Zth(delay) in degC with ``foster`` the junction's Zth (K/W) from
    thermal equilibrium; checked against ``junction_limit_c`` (degC) and against the SOA
    line ``soa_time_s`` (n_points,) strictly increasing in s, ``soa_current_a`` (n_points,)
    decreasing or flat in A, at that input voltage (see the module docstring for the ends).

    >>> f = FosterStages(np.array([0.05, 0.4]), np.array([1e-4, 5e-3]))
    >>> r = breaker_stress(vin_v=12.0, current_limit_a=20.0, delay_s=2e-3, foster=f,
    ...                    start_temp_c=50.0, junction_limit_c=150.0,
    ...                    soa_time_s=[1e-4, 1e-3, 1e-2], soa_current_a=[100.0, 40.0, 15.0])
    >>> print(f"{r.peak_junction_c:.2f} degC, SOA {r.soa_allowed_a:.2f} A, {r.passes}, {r.binding}")
    93.65 degC, SOA 29.77 A, True, none
    """
    if np.ndim(delay_s) != 0:
        raise ValueError("delay_s must be a single delay (use stress_curve for an array)")
    curve = stress_curve(
        vin_v=vin_v,
        current_limit_a=current_limit_a,
        delay_s=[delay_s],  # shape (1,): the same arithmetic as longest_safe_delay_s
        foster=foster,
        start_temp_c=start_temp_c,
        junction_limit_c=junction_limit_c,
        soa_time_s=soa_time_s,
        soa_current_a=soa_current_a,
    )
    return BreakerStress(
        peak_junction_c=float(curve.peak_junction_c[0]),
        rise_k=float(curve.rise_k[0]),
        margin_k=float(curve.margin_k[0]),
        soa_allowed_a=float(curve.soa_allowed_a[0]),
        soa_margin_a=float(curve.soa_margin_a[0]),
        passes=bool(curve.passes[0]),
        binding=cast(Binding, str(curve.binding[0])),
        within_soa_data=bool(curve.within_soa_data[0]),
    )


def longest_safe_delay_s(
    *,
    vin_v: float,
    current_limit_a: float,
    foster: FosterStages,
    start_temp_c: float,
    junction_limit_c: float,
    soa_time_s: npt.ArrayLike,
    soa_current_a: npt.ArrayLike,
) -> float:
    """Longest breaker delay in s that still passes both checks of :func:`breaker_stress`.

    Zth grows with the delay and the SOA current does not, so the set of passing delays is
    an interval (0, d*]. Returns:

    * 0.0 if even an arbitrarily short delay fails (the start temperature is at or above
      the limit, or the limited current exceeds the SOA current of the shortest tabulated
      pulse);
    * ``soa_time_s[-1]`` if the last tabulated duration still passes. The top end is the
      end of the SOA data, not infinity: longer delays are outside the SOA data and do not
      pass, so a result equal to ``soa_time_s[-1]`` means "safe up to where the data end";
    * otherwise d*, bracketed between a delay that provably passes and the last SOA
      duration, and refined in ln(delay) to a
      relative 1e-12 by :func:`thermal.bracketed_root` (a safeguarded regula falsi, used
      instead of brentq because it returns the passing end of the final bracket, so
      :func:`breaker_stress` at the returned delay passes).

    >>> f = FosterStages(np.array([0.05, 0.4]), np.array([1e-4, 5e-3]))
    >>> soa = {"soa_time_s": [1e-4, 1e-3, 1e-2], "soa_current_a": [100.0, 40.0, 15.0]}
    >>> d = longest_safe_delay_s(vin_v=12.0, current_limit_a=20.0, foster=f, start_temp_c=50.0,
    ...                          junction_limit_c=150.0, **soa)
    >>> print(f"{d * 1e3:.4f} ms")  # the SOA line crosses 20 A at 1 ms x 2^(1/0.42597)
    5.0897 ms
    """
    breaker = _Breaker.build(
        vin_v=vin_v,
        current_limit_a=current_limit_a,
        foster=foster,
        start_temp_c=start_temp_c,
        junction_limit_c=junction_limit_c,
        soa_time_s=soa_time_s,
        soa_current_a=soa_current_a,
    )
    headroom = breaker.junction_limit_c - breaker.start_temp_c
    if not headroom > 0.0 or breaker.current_limit_a > breaker.soa_current_a[0]:
        return 0.0
    last_s = float(breaker.soa_time_s[-1])
    if breaker.curve(np.array(last_s)).passes:
        return last_s

    top = np.log(last_s)

    def excess(log_delay: FloatArray) -> FloatArray:
        """> 0 where the delay fails (+inf outside the SOA data), <= 0 where it passes."""
        c = breaker.curve(np.where(log_delay >= top, last_s, np.exp(log_delay)))
        worst = np.maximum(-c.margin_k / headroom, -c.soa_margin_a / breaker.current_limit_a)
        return np.asarray(np.where(c.within_soa_data, worst, np.inf))

    # Passes for sure: the rise is at most P t sum(R_i / tau_i) <= headroom / 2, and the
    # delay lies below the first SOA point, whose current was checked above.
    rate_k_per_w_s = float(np.sum(breaker.foster.r_k_per_w / breaker.foster.tau_s))
    first_s = 0.5 * min(headroom / (breaker.power_w * rate_k_per_w_s), breaker.soa_time_s[0])
    lo, _ = bracketed_root(excess, np.log([first_s]), np.array([top]), rtol=0.0, atol=_LOG_ATOL)
    return float(np.exp(lo)[0])  # the very value ``excess`` checked
