"""Current sensing through an inductor's copper winding resistance (DCR).

A lossless sensing network reproduces the voltage across the winding's DC resistance,
so the phase current is I = V_sense / DCR(T). Copper follows the IEC 60028 law
R(T) = R20 (1 + alpha20 (T - 20 degC)); a sensor that ignores the temperature of the
winding over-reads by about alpha20 = 0.393 % per kelvin above its reference.

All functions broadcast their array arguments (numpy rules) and return float64 arrays
(0-d for scalar inputs). NaN in a measured input (``temp_c``, ``sense_v``) marks a
missing reading and gives NaN in the result; infinities and out-of-range values raise
ValueError naming the argument.
"""

import numpy as np
import numpy.typing as npt

from phaseward.physics.constants import ALPHA_CU_20, T_REF_CU_C

FloatArray = npt.NDArray[np.float64]


def copper_resistance_ohm(
    r_ref_ohm: npt.ArrayLike,
    temp_c: npt.ArrayLike,
    *,
    ref_temp_c: npt.ArrayLike = T_REF_CU_C,
    alpha_per_k: float = ALPHA_CU_20,
) -> FloatArray:
    """Resistance of a copper winding at ``temp_c``, given ``r_ref_ohm`` measured at ``ref_temp_c``.

    R(T) = R_ref (1 + a (T - 20)) / (1 + a (T_ref - 20)), with ``a = alpha_per_k`` the
    coefficient referenced to 20 degC (IEC 60028). Arguments broadcast; the result has
    the broadcast shape.

    Raises ValueError if ``r_ref_ohm`` is not positive and finite, ``alpha_per_k`` is not
    positive, or a temperature lies at or below the law's zero-resistance point.

    >>> print(f"{copper_resistance_ohm(1.0e-3, 100.0):.6f}")
    0.001314
    >>> np.round(copper_resistance_ohm(1.0e-3, [20.0, 45.0], ref_temp_c=45.0) * 1e3, 4)
    array([0.9105, 1.    ])
    """
    r_ref = np.asarray(r_ref_ohm, dtype=np.float64)
    if not np.all(np.isfinite(r_ref) & (r_ref > 0.0)):
        raise ValueError("r_ref_ohm must be positive and finite")
    if not (np.isfinite(alpha_per_k) and alpha_per_k > 0.0):
        raise ValueError("alpha_per_k must be positive and finite")
    factor = 1.0 + alpha_per_k * (np.asarray(temp_c, dtype=np.float64) - T_REF_CU_C)
    ref_factor = 1.0 + alpha_per_k * (np.asarray(ref_temp_c, dtype=np.float64) - T_REF_CU_C)
    if not np.all(np.isnan(factor) | (np.isfinite(factor) & (factor > 0.0))):
        raise ValueError(
            "temp_c must be finite (or NaN) and above the copper law's zero-resistance point"
        )
    if not np.all(np.isfinite(ref_factor) & (ref_factor > 0.0)):
        raise ValueError(
            "ref_temp_c must be finite and above the copper law's zero-resistance point"
        )
    return np.asarray(r_ref * factor / ref_factor, dtype=np.float64)


def dcr_sense_to_current_a(
    sense_v: npt.ArrayLike,
    dcr_ref_ohm: npt.ArrayLike,
    temp_c: npt.ArrayLike,
    *,
    ref_temp_c: npt.ArrayLike = T_REF_CU_C,
    alpha_per_k: float = ALPHA_CU_20,
) -> FloatArray:
    """Phase current from a DCR sense voltage, compensated for the winding temperature.

    I = sense_v / DCR(temp_c), with DCR(T) from :func:`copper_resistance_ohm` and
    ``dcr_ref_ohm`` the DCR measured at ``ref_temp_c``. Arguments broadcast, so a trace of
    shape (n_samples, n_phases) can be converted in one call.

    >>> print(f"{dcr_sense_to_current_a(5.0e-3, 0.2e-3, 20.0):.3f}")
    25.000
    >>> np.round(dcr_sense_to_current_a([5.0e-3, 5.0e-3], 0.2e-3, [20.0, 70.0]), 3)
    array([25.   , 20.894])
    """
    sense = np.asarray(sense_v, dtype=np.float64)
    if np.any(np.isinf(sense)):
        raise ValueError("sense_v must be finite (or NaN for a missing reading)")
    dcr = copper_resistance_ohm(dcr_ref_ohm, temp_c, ref_temp_c=ref_temp_c, alpha_per_k=alpha_per_k)
    return np.asarray(sense / dcr, dtype=np.float64)


def uncompensated_reading_error(
    temp_c: npt.ArrayLike,
    *,
    ref_temp_c: npt.ArrayLike = T_REF_CU_C,
    alpha_per_k: float = ALPHA_CU_20,
) -> FloatArray:
    """Relative over-read of a DCR sensor that assumes the winding stays at ``ref_temp_c``.

    The sensor reports V / DCR(T_ref) = I DCR(T) / DCR(T_ref), so the relative error is
    DCR(T) / DCR(T_ref) - 1 (dimensionless, positive when the winding is hotter).

    >>> print(f"{uncompensated_reading_error(21.0):.5f}")
    0.00393
    >>> print(f"{uncompensated_reading_error(85.0, ref_temp_c=25.0):.4f}")
    0.2313
    """
    return copper_resistance_ohm(1.0, temp_c, ref_temp_c=ref_temp_c, alpha_per_k=alpha_per_k) - 1.0
