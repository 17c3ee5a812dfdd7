"""Buck-converter ripple and multiphase interleaving.

Source: Erickson and Maksimovic, *Fundamentals of Power Electronics* (ideal synchronous
buck in continuous conduction: D = Vout/Vin, inductor ripple from the volt-second balance).

Convention: every ripple value in phaseward is peak-to-peak (maximum minus minimum over
one switching period), for currents and voltages alike.

Phase model: each phase's inductor current is a triangle that rises for D T_sw with
slope (Vin - Vout)/L and falls for (1 - D) T_sw with slope -Vout/L, so every phase has
the same peak-to-peak ripple dI. A phase at angle theta (degrees) turns on at
theta/360 T_sw. The output current (sum of the phases) is piecewise linear with
breakpoints at each phase's turn-on and turn-off instants, so its maximum minus minimum
is read exactly at those breakpoints; the only error is float rounding (relative error
below 1e-9 of the single-phase ripple). The output capacitor takes the AC part of that
current (constant load current).

Batches: ``phase_angles_deg`` has shape (n_phases,) or (n_cases, n_phases); NaN marks a
phase that is absent in that case. The other array arguments broadcast against the case
shape ``phase_angles_deg.shape[:-1]``; results have the broadcast case shape.
"""

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]


def _checked(value: npt.ArrayLike, name: str, *, allow_zero: bool = False) -> FloatArray:
    """``value`` as float64, ValueError unless finite and positive (or non-negative)."""
    arr = np.asarray(value, dtype=np.float64)
    ok = np.isfinite(arr) & ((arr >= 0.0) if allow_zero else (arr > 0.0))
    if not np.all(ok):
        raise ValueError(f"{name} must be finite and {'>= 0' if allow_zero else '> 0'}")
    return arr


def duty_cycle(vin_v: npt.ArrayLike, vout_v: npt.ArrayLike) -> FloatArray:
    """Ideal CCM buck duty cycle D = Vout / Vin (dimensionless, broadcast shape).

    ValueError unless 0 < vout_v < vin_v everywhere.

    >>> print(f"{duty_cycle(12.0, 1.8):.3f}")
    0.150
    """
    vin = _checked(vin_v, "vin_v")
    vout = _checked(vout_v, "vout_v")
    if not np.all(vout < vin):
        raise ValueError("vout_v must be below vin_v (0 < vout_v < vin_v)")
    return np.asarray(vout / vin, dtype=np.float64)


def inductor_ripple_pp_a(
    vin_v: npt.ArrayLike,
    vout_v: npt.ArrayLike,
    inductance_h: npt.ArrayLike,
    fsw_hz: npt.ArrayLike,
) -> FloatArray:
    """Peak-to-peak inductor ripple of one phase, dI = (Vin - Vout) D / (L fsw), in A.

    >>> print(f"{inductor_ripple_pp_a(12.0, 1.8, 1.0e-6, 300e3):.3f}")
    5.100
    """
    d = duty_cycle(vin_v, vout_v)
    inductance = _checked(inductance_h, "inductance_h")
    fsw = _checked(fsw_hz, "fsw_hz")
    vin = np.asarray(vin_v, dtype=np.float64)
    vout = np.asarray(vout_v, dtype=np.float64)
    return np.asarray((vin - vout) * d / (inductance * fsw), dtype=np.float64)


def rms_current_a(dc_current_a: npt.ArrayLike, ripple_pp_a: npt.ArrayLike) -> FloatArray:
    """RMS of a triangle ripple on a DC level, sqrt(I^2 + dI^2 / 12), in A (broadcast shape).

    >>> print(f"{rms_current_a(20.0, 5.1):.4f}")
    20.0541
    """
    dc = np.asarray(dc_current_a, dtype=np.float64)
    if not np.all(np.isfinite(dc)):
        raise ValueError("dc_current_a must be finite")
    ripple = _checked(ripple_pp_a, "ripple_pp_a", allow_zero=True)
    return np.asarray(triangle_rms_a(dc, ripple**2 / 12.0), dtype=np.float64)


def triangle_rms_a(dc_current_a: FloatArray, ripple_sq_12_a2: FloatArray) -> FloatArray:
    """:func:`rms_current_a` from checked float arrays and dI^2 / 12 (A^2), for hot paths that
    compute the ripple term once."""
    return np.sqrt(dc_current_a**2 + ripple_sq_12_a2)


def _angles(phase_angles_deg: npt.ArrayLike) -> FloatArray:
    angles = np.asarray(phase_angles_deg, dtype=np.float64)
    if angles.ndim == 0 or angles.shape[-1] == 0:
        raise ValueError("phase_angles_deg must have shape (n_phases,) or (n_cases, n_phases)")
    if np.any(np.isinf(angles)):
        raise ValueError("phase_angles_deg must be finite, or NaN for an absent phase")
    if not np.all(np.any(~np.isnan(angles), axis=-1)):
        raise ValueError("phase_angles_deg must leave at least one phase in every case")
    return angles


def _breakpoints(
    duty: FloatArray, angles: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray, tuple[int, ...]]:
    """Sum of unit peak-to-peak phase triangles at every breakpoint, sorted in time.

    ``duty`` broadcasts against the case shape ``angles.shape[:-1]``. Returns, with the
    cases flattened to n and B = 2 n_phases breakpoints per case: times ``tau`` (n, B) in
    units of the switching period, levels (n, B) in units of dI, the number of phases
    present (n,), and the case shape. An absent phase gets weight 0 and offset 0; its
    breakpoints are then harmless extra samples of the waveform.
    """
    cases = np.broadcast_shapes(angles.shape[:-1], duty.shape)
    n_phases = angles.shape[-1]
    full = (*cases, n_phases)
    present = np.broadcast_to(~np.isnan(angles), full).reshape(-1, n_phases)
    offset = np.mod(np.nan_to_num(angles, nan=0.0) / 360.0, 1.0)
    offset = np.broadcast_to(offset, full).reshape(-1, n_phases)
    d = np.broadcast_to(duty, cases).reshape(-1, 1)
    tau = np.sort(np.mod(np.concatenate([offset, offset + d], axis=1), 1.0), axis=1)
    since_on = np.mod(tau[:, np.newaxis, :] - offset[:, :, np.newaxis], 1.0)
    d3 = d[:, :, np.newaxis]
    triangle = np.where(since_on < d3, since_on / d3, (1.0 - since_on) / (1.0 - d3))
    weight = present.astype(np.float64)
    level = np.einsum("cp,cpb->cb", weight, triangle)
    return tau, level, weight.sum(axis=1), cases


def interleaved_ripple_pp_a(
    vin_v: npt.ArrayLike,
    vout_v: npt.ArrayLike,
    inductance_h: npt.ArrayLike,
    fsw_hz: npt.ArrayLike,
    phase_angles_deg: npt.ArrayLike,
) -> FloatArray:
    """Peak-to-peak output (summed) ripple current of phases at arbitrary angles, in A.

    ``phase_angles_deg``: (n_phases,) or (n_cases, n_phases), NaN = phase absent. Result:
    shape () or (n_cases,) (the case shape broadcast with the other arguments).

    >>> print(f"{interleaved_ripple_pp_a(12.0, 1.8, 1.0e-6, 300e3, [0, 90, 180, 270]):.3f}")
    2.400
    >>> np.round(interleaved_ripple_pp_a(12.0, 1.8, 1.0e-6, 300e3,
    ...                                  [[0, 90, 180, np.nan], [0, 120, 240, np.nan]]), 3)
    array([6.3, 3.3])
    """
    single = inductor_ripple_pp_a(vin_v, vout_v, inductance_h, fsw_hz)
    _, level, _, cases = _breakpoints(duty_cycle(vin_v, vout_v), _angles(phase_angles_deg))
    ratio = (level.max(axis=1) - level.min(axis=1)).reshape(cases)
    return np.asarray(single * ratio, dtype=np.float64)


def interleaved_ripple_ratio_even(n_phases: npt.ArrayLike, duty: npt.ArrayLike) -> FloatArray:
    """Output ripple over single-phase ripple for N phases evenly spaced by 360/N degrees.

    K = N (D - m/N) ((m + 1)/N - D) / (D (1 - D)) with m = floor(N D) (from memory; checked
    against the time-domain superposition for N = 1..12 in tests/reference). K = 0 at
    D = m/N (full cancellation). Arguments broadcast.

    >>> np.round(interleaved_ripple_ratio_even([1, 2, 4], 0.15), 4)
    array([1.    , 0.8235, 0.4706])
    """
    n = np.asarray(n_phases, dtype=np.float64)
    if not np.all((n >= 1) & (n == np.floor(n))):
        raise ValueError("n_phases must be an integer >= 1")
    d = _checked(duty, "duty")
    if not np.all(d < 1.0):
        raise ValueError("duty must lie strictly between 0 and 1")
    m = np.floor(n * d)
    return np.asarray(n * (d - m / n) * ((m + 1) / n - d) / (d * (1.0 - d)), dtype=np.float64)


def _survivors(n_phases_total: int, lost: npt.ArrayLike) -> IntArray:
    if isinstance(n_phases_total, bool) or not isinstance(n_phases_total, int):
        raise ValueError("n_phases_total must be an int")
    if n_phases_total < 1:
        raise ValueError("n_phases_total must be >= 1")
    gone = np.asarray(lost)
    if gone.size == 0:
        gone = gone.astype(np.int64)
    if gone.ndim != 1 or gone.dtype.kind not in "iu":
        raise ValueError("lost must be a sequence of integer phase indices")
    if np.any(gone < 0) or np.any(gone >= n_phases_total) or np.unique(gone).size != gone.size:
        raise ValueError(f"lost must hold distinct indices in 0..{n_phases_total - 1}")
    kept = np.setdiff1d(np.arange(n_phases_total), gone)
    if kept.size == 0:
        raise ValueError("lost must leave at least one phase")
    return kept


def gapped_angles_deg(n_phases_total: int, lost: npt.ArrayLike) -> FloatArray:
    """Angles of the survivors left where they were (phase i at i 360/N), shape (N - k,).

    >>> gapped_angles_deg(4, [3]).tolist()
    [0.0, 90.0, 180.0]
    """
    return np.asarray(_survivors(n_phases_total, lost) * (360.0 / n_phases_total))


def respaced_angles_deg(n_phases_total: int, lost: npt.ArrayLike) -> FloatArray:
    """Angles of the survivors re-spaced evenly by 360/(N - k), in index order, (N - k,).

    >>> respaced_angles_deg(4, [1]).tolist()
    [0.0, 120.0, 240.0]
    """
    n_left = _survivors(n_phases_total, lost).size
    return np.arange(n_left, dtype=np.float64) * (360.0 / n_left)


def output_ripple_voltage_pp_v(
    ripple_current_pp_a: npt.ArrayLike,
    capacitance_f: npt.ArrayLike,
    esr_ohm: npt.ArrayLike,
    ripple_frequency_hz: npt.ArrayLike,
) -> FloatArray:
    """Usual estimate of the output ripple voltage, dI / (8 f C) + dI ESR, in V.

    The capacitive term is exact for a triangular current at frequency f; adding the ESR
    term assumes both peaks coincide, an upper-bound-style sum (common practice). For N
    evenly spaced phases the output current ripple repeats at f = N fsw.

    >>> print(f"{output_ripple_voltage_pp_v(2.4, 1.0e-3, 0.5e-3, 1.2e6) * 1e3:.3f}")  # mV
    1.450
    """
    ripple = _checked(ripple_current_pp_a, "ripple_current_pp_a", allow_zero=True)
    capacitance = _checked(capacitance_f, "capacitance_f")
    esr = _checked(esr_ohm, "esr_ohm", allow_zero=True)
    frequency = _checked(ripple_frequency_hz, "ripple_frequency_hz")
    return np.asarray(ripple / (8.0 * frequency * capacitance) + ripple * esr, dtype=np.float64)


def output_ripple_voltage_pp_from_waveform_v(
    vin_v: npt.ArrayLike,
    vout_v: npt.ArrayLike,
    inductance_h: npt.ArrayLike,
    fsw_hz: npt.ArrayLike,
    phase_angles_deg: npt.ArrayLike,
    *,
    capacitance_f: npt.ArrayLike,
    esr_ohm: npt.ArrayLike,
) -> FloatArray:
    """Exact peak-to-peak output ripple voltage of the superposed phase currents, in V.

    The capacitor carries the AC part i_c of the summed phase current; its voltage is
    v = (1/C) integral(i_c dt) + ESR i_c, piecewise quadratic between breakpoints. The
    extremes are taken at the breakpoints and at the stationary point inside each piece,
    so the result is exact (up to float rounding). Shapes as in
    :func:`interleaved_ripple_pp_a`.

    >>> v = output_ripple_voltage_pp_from_waveform_v(
    ...     12.0, 1.8, 1.0e-6, 300e3, [0, 90, 180, 270], capacitance_f=1.0e-3, esr_ohm=0.5e-3)
    >>> print(f"{v * 1e3:.3f}")  # mV; output_ripple_voltage_pp_v gives 1.450 here
    1.200
    """
    single = inductor_ripple_pp_a(vin_v, vout_v, inductance_h, fsw_hz)
    per_ohm = 1.0 / (_checked(fsw_hz, "fsw_hz") * _checked(capacitance_f, "capacitance_f"))
    esr = _checked(esr_ohm, "esr_ohm", allow_zero=True)
    duty = duty_cycle(vin_v, vout_v)
    duty = np.broadcast_to(duty, np.broadcast_shapes(duty.shape, per_ohm.shape, esr.shape))
    tau, level, n_present, cases = _breakpoints(duty, _angles(phase_angles_deg))
    alpha = np.broadcast_to(per_ohm, cases).reshape(-1, 1)  # ohm: (1 / (fsw C))
    beta = np.broadcast_to(esr, cases).reshape(-1, 1)  # ohm
    # Close the period and take the AC part (a unit triangle averages 1/2), in units of dI.
    times = np.concatenate([tau, tau[:, :1] + 1.0], axis=1)
    ac = level - 0.5 * n_present[:, np.newaxis]
    ac = np.concatenate([ac, ac[:, :1]], axis=1)
    dt = np.diff(times, axis=1)
    charge = np.concatenate(
        [np.zeros_like(dt[:, :1]), np.cumsum(0.5 * dt * (ac[:, :-1] + ac[:, 1:]), axis=1)], axis=1
    )
    slope = np.divide(np.diff(ac, axis=1), dt, out=np.zeros_like(dt), where=dt > 0.0)
    at_breaks = alpha * charge + beta * ac
    # Inside a piece, dv/dtau = alpha ac + beta slope vanishes at x from the piece start.
    x = np.divide(
        -beta * slope / alpha - ac[:, :-1], slope, out=np.zeros_like(dt), where=slope != 0.0
    )
    inside = (slope != 0.0) & (x > 0.0) & (x < dt)
    stationary = alpha * (charge[:, :-1] + ac[:, :-1] * x + 0.5 * slope * x**2) + beta * (
        ac[:, :-1] + slope * x
    )
    candidates = np.concatenate(
        [at_breaks, np.where(inside, stationary, at_breaks[:, :-1])], axis=1
    )
    spread = (candidates.max(axis=1) - candidates.min(axis=1)).reshape(cases)
    return np.asarray(single * spread, dtype=np.float64)
