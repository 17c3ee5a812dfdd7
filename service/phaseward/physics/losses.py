"""Loss of one buck-converter phase, affine in its junction temperature.

Source: Erickson and Maksimovic, *Fundamentals of Power Electronics* (synchronous buck in
continuous conduction). With D = Vout/Vin, ripple dI (peak-to-peak, :mod:`ripple`) and
I_rms^2 = I^2 + dI^2/12 for a phase carrying mean current I:

* high-side conduction  D I_rms^2 Rds_h(T)
* low-side conduction   (1 - D) I_rms^2 Rds_l(T)
* switching             0.5 Vin |I| (t_r + t_f) fsw
* gate drive            Q_g V_drv fsw (Q_g: total charge of both switches)
* dead time             2 V_d |I| t_dead fsw (body diode conducts twice per period)
* inductor copper       I_rms^2 DCR(T), DCR(T) by the copper law of :mod:`sensing`
* core                  a per-phase parameter

with Rds(T) = Rds_ref (1 + tc (T - T_ref)). Alternatively a phase may give its power-stage
loss (switches, driver, dead time) as a table of loss versus |I| from a datasheet, scaled by
(1 + tc (T - T_ref)); the table is taken to cover the power stage only, so inductor copper
and core loss are added to it. The table is interpolated linearly and extrapolated linearly
from its end segments (not held flat as ``np.interp`` would): stage loss grows faster than
linearly with current, so a flat tail would understate it exactly where the capacity search
probes above the table; the linear tail still understates a convex curve, so tables should
reach the rated current. Interpolated loss is clipped at 0 W.

Modelling decision: every term is affine in temperature (the resistance laws) or does not
depend on it, so for a given current the phase loss is exactly P(T) = p0 + s T with T in
degC. T is the phase's junction temperature: as a lumped simplification the inductor winding
is taken at the junction temperature too. This keeps the coupled thermal network linear
(:mod:`thermal`). Switching, gate, dead-time and core loss are taken as independent of T.

A phase at zero current still switches, so it has gate, core and ripple losses; the caller
zeroes the loss of an isolated phase itself.
"""

from dataclasses import dataclass, replace
from functools import cached_property
from typing import NamedTuple

import numpy as np
import numpy.typing as npt

from phaseward.physics.constants import T_REF_CU_C
from phaseward.physics.ripple import duty_cycle, inductor_ripple_pp_a, triangle_rms_a
from phaseward.physics.sensing import copper_resistance_ohm

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]

_PROBE_C = 100.0  # degC, second temperature at which the affine loss is sampled
_PROBES_C = np.array([0.0, _PROBE_C])  # where loss_coefficients samples the affine loss
_DATASHEET_REF_C = 25.0  # degC, where datasheets state Rds(on) and loss curves (common practice)
_POSITIVE = ("vin_v", "vout_v", "fsw_hz", "inductance_h")
_NONNEGATIVE = (
    "dcr_ohm",
    "rds_high_ohm",
    "rds_low_ohm",
    "rise_time_s",
    "fall_time_s",
    "gate_charge_c",
    "drive_v",
    "dead_time_s",
    "diode_drop_v",
    "core_loss_w",
)
_ANY_FINITE = ("dcr_ref_c", "rds_ref_c", "rds_tc_per_k", "table_ref_c", "table_tc_per_k")


@dataclass(frozen=True, eq=False)
class PhaseLossParams:
    """Per-phase loss parameters; every field is an array of shape (n_phases,) unless noted.

    Volts, hertz, henry, ohm, seconds, coulomb, watt; reference temperatures in degC and
    temperature coefficients in 1/K. ``table_current_a`` and ``table_loss_w`` have shape
    (n_phases, n_points): for a phase with ``uses_table`` its finite entries (at least two,
    currents strictly increasing, NaN padding at the end of a row) give the power-stage loss
    in W versus |I| in A at ``table_ref_c``. :meth:`build` broadcasts scalars.
    ValueError naming the field for a wrong shape, a non-finite value, L or fsw <= 0, a
    negative resistance, time, charge or loss, or not 0 < vout_v < vin_v.
    """

    vin_v: FloatArray
    vout_v: FloatArray
    fsw_hz: FloatArray
    inductance_h: FloatArray
    dcr_ohm: FloatArray
    dcr_ref_c: FloatArray
    rds_high_ohm: FloatArray
    rds_low_ohm: FloatArray
    rds_ref_c: FloatArray
    rds_tc_per_k: FloatArray
    rise_time_s: FloatArray
    fall_time_s: FloatArray
    gate_charge_c: FloatArray
    drive_v: FloatArray
    dead_time_s: FloatArray
    diode_drop_v: FloatArray
    core_loss_w: FloatArray
    table_current_a: FloatArray
    table_loss_w: FloatArray
    table_ref_c: FloatArray
    table_tc_per_k: FloatArray
    uses_table: BoolArray

    def __post_init__(self) -> None:
        n = np.shape(self.vin_v)[0] if np.ndim(self.vin_v) == 1 else 0
        if n == 0:
            raise ValueError("vin_v must have shape (n_phases,) with n_phases >= 1")
        for name in (*_POSITIVE, *_NONNEGATIVE, *_ANY_FINITE):
            arr = np.array(getattr(self, name), dtype=np.float64)
            if arr.shape != (n,):
                raise ValueError(f"{name} must have shape (n_phases,) = ({n},)")
            if not np.all(np.isfinite(arr)):
                raise ValueError(f"{name} must be finite")
            if name in _POSITIVE and not np.all(arr > 0.0):
                raise ValueError(f"{name} must be > 0")
            if name in _NONNEGATIVE and not np.all(arr >= 0.0):
                raise ValueError(f"{name} must be >= 0")
            self._store(name, arr)
        if not np.all(self.vout_v < self.vin_v):
            raise ValueError("vout_v must be below vin_v (0 < vout_v < vin_v)")
        uses = np.array(self.uses_table)
        if uses.shape != (n,) or uses.dtype != np.bool_:
            raise ValueError(f"uses_table must be a boolean array of shape ({n},)")
        self._store("uses_table", uses)
        current = np.array(self.table_current_a, dtype=np.float64)
        loss = np.array(self.table_loss_w, dtype=np.float64)
        for name, arr in (("table_current_a", current), ("table_loss_w", loss)):
            if arr.ndim != 2 or arr.shape[0] != n or arr.shape != current.shape:
                raise ValueError(f"{name} must have shape (n_phases, n_points) with n_phases={n}")
            if np.any(np.isinf(arr)):
                raise ValueError(f"{name} must be finite (NaN only as padding)")
        valid = ~np.isnan(current[uses])
        count = valid.sum(axis=1)
        if np.any(count < 2) or np.any(valid[:, 1:] & ~valid[:, :-1]):
            raise ValueError(
                "table_current_a needs >= 2 points per table phase, NaN only at the end"
            )
        if not np.array_equal(valid, ~np.isnan(loss[uses])):
            raise ValueError("table_loss_w must have a value wherever table_current_a has one")
        if np.any(np.diff(current[uses], axis=1) <= 0.0):
            raise ValueError("table_current_a must be strictly increasing along each row")
        if np.any(loss[uses][valid] < 0.0):
            raise ValueError("table_loss_w must be >= 0")
        self._store("table_current_a", current)
        self._store("table_loss_w", loss)

    def _store(self, name: str, arr: npt.NDArray[np.generic]) -> None:
        arr.setflags(write=False)
        object.__setattr__(self, name, arr)

    @cached_property
    def _fixed(self) -> "_Fixed":
        """What the loss terms take of the parameters alone, computed once (the parameters
        are immutable): the same operations :func:`phase_losses` applied on every call."""
        ripple = inductor_ripple_pp_a(self.vin_v, self.vout_v, self.inductance_h, self.fsw_hz)
        duty = duty_cycle(self.vin_v, self.vout_v)
        formula = ~self.uses_table
        return _Fixed(
            duty=duty,
            off_duty=1.0 - duty,
            ripple_sq_12=ripple**2 / 12.0,
            formula=formula,
            switching_v_s=(0.5 * self.vin_v, self.rise_time_s + self.fall_time_s),
            dead_v=2.0 * self.diode_drop_v,
            gate_w=np.where(formula, self.gate_charge_c * self.drive_v * self.fsw_hz, 0.0),
            copper_at_probes=copper_resistance_ohm(
                1.0, _PROBES_C[:, None], ref_temp_c=self.dcr_ref_c
            ),
        )

    @property
    def n_phases(self) -> int:
        """Number of phases."""
        return int(self.vin_v.size)

    @classmethod
    def build(
        cls,
        n_phases: int,
        *,
        vin_v: npt.ArrayLike,
        vout_v: npt.ArrayLike,
        fsw_hz: npt.ArrayLike,
        inductance_h: npt.ArrayLike,
        dcr_ohm: npt.ArrayLike,
        dcr_ref_c: npt.ArrayLike = T_REF_CU_C,
        rds_high_ohm: npt.ArrayLike = 0.0,
        rds_low_ohm: npt.ArrayLike = 0.0,
        rds_ref_c: npt.ArrayLike = _DATASHEET_REF_C,
        rds_tc_per_k: npt.ArrayLike = 0.0,
        rise_time_s: npt.ArrayLike = 0.0,
        fall_time_s: npt.ArrayLike = 0.0,
        gate_charge_c: npt.ArrayLike = 0.0,
        drive_v: npt.ArrayLike = 0.0,
        dead_time_s: npt.ArrayLike = 0.0,
        diode_drop_v: npt.ArrayLike = 0.0,
        core_loss_w: npt.ArrayLike = 0.0,
        table_current_a: npt.ArrayLike | None = None,
        table_loss_w: npt.ArrayLike | None = None,
        table_ref_c: npt.ArrayLike = _DATASHEET_REF_C,
        table_tc_per_k: npt.ArrayLike = 0.0,
        uses_table: npt.ArrayLike | None = None,
    ) -> "PhaseLossParams":
        """Parameters with scalars (or (n_points,) tables) broadcast to ``n_phases`` phases.

        Terms left at their default contribute nothing; ``uses_table`` defaults to True for
        every phase when tables are given, else to False.

        >>> p = PhaseLossParams.build(4, vin_v=12.0, vout_v=1.0, fsw_hz=500e3,
        ...                           inductance_h=150e-9, dcr_ohm=0.2e-3)
        >>> p.n_phases, p.dcr_ohm.shape, p.table_current_a.shape
        (4, (4,), (4, 0))
        """
        if isinstance(n_phases, bool) or not isinstance(n_phases, int) or n_phases < 1:
            raise ValueError("n_phases must be an int >= 1")
        if (table_current_a is None) != (table_loss_w is None):
            raise ValueError("table_current_a and table_loss_w must be given together")
        if uses_table is None:
            uses_table = table_current_a is not None
        if table_current_a is None or table_loss_w is None:
            table_current_a = table_loss_w = np.zeros((n_phases, 0))
        width = np.shape(table_current_a)[-1]

        def each(name: str, value: npt.ArrayLike, *, table: bool = False) -> FloatArray:
            shape = (n_phases, width) if table else (n_phases,)
            try:
                return np.broadcast_to(np.asarray(value, dtype=np.float64), shape)
            except ValueError:
                raise ValueError(f"{name} must broadcast to shape {shape}") from None

        return cls(
            vin_v=each("vin_v", vin_v),
            vout_v=each("vout_v", vout_v),
            fsw_hz=each("fsw_hz", fsw_hz),
            inductance_h=each("inductance_h", inductance_h),
            dcr_ohm=each("dcr_ohm", dcr_ohm),
            dcr_ref_c=each("dcr_ref_c", dcr_ref_c),
            rds_high_ohm=each("rds_high_ohm", rds_high_ohm),
            rds_low_ohm=each("rds_low_ohm", rds_low_ohm),
            rds_ref_c=each("rds_ref_c", rds_ref_c),
            rds_tc_per_k=each("rds_tc_per_k", rds_tc_per_k),
            rise_time_s=each("rise_time_s", rise_time_s),
            fall_time_s=each("fall_time_s", fall_time_s),
            gate_charge_c=each("gate_charge_c", gate_charge_c),
            drive_v=each("drive_v", drive_v),
            dead_time_s=each("dead_time_s", dead_time_s),
            diode_drop_v=each("diode_drop_v", diode_drop_v),
            core_loss_w=each("core_loss_w", core_loss_w),
            table_current_a=each("table_current_a", table_current_a, table=True),
            table_loss_w=each("table_loss_w", table_loss_w, table=True),
            table_ref_c=each("table_ref_c", table_ref_c),
            table_tc_per_k=each("table_tc_per_k", table_tc_per_k),
            uses_table=each("uses_table", uses_table).astype(np.bool_),
        )


class _Fixed(NamedTuple):
    duty: FloatArray  # D
    off_duty: FloatArray  # 1 - D
    ripple_sq_12: FloatArray  # dI^2 / 12, A^2
    formula: BoolArray  # phases on the switch formulas (no table)
    switching_v_s: tuple[FloatArray, FloatArray]  # 0.5 Vin, t_r + t_f
    dead_v: FloatArray  # 2 V_d
    gate_w: FloatArray  # Q_g V_drv fsw on formula phases, else 0
    copper_at_probes: FloatArray  # (2, n_phases) DCR(T) / DCR_ref at 0 and _PROBE_C degC


@dataclass(frozen=True, eq=False)
class LossBreakdown:
    """Loss terms in W, each of the broadcast shape (..., n_phases) of the call.

    A table phase reports its power-stage loss in ``stage_table_w`` and zero in the five
    switch terms; a formula phase reports zero in ``stage_table_w``.
    """

    high_side_w: FloatArray
    low_side_w: FloatArray
    switching_w: FloatArray
    gate_w: FloatArray
    dead_time_w: FloatArray
    inductor_copper_w: FloatArray
    core_w: FloatArray
    stage_table_w: FloatArray

    @property
    def total_w(self) -> FloatArray:
        """Sum of all terms, W, shape (..., n_phases)."""
        return np.asarray(
            self.high_side_w
            + self.low_side_w
            + self.switching_w
            + self.gate_w
            + self.dead_time_w
            + self.inductor_copper_w
            + self.core_w
            + self.stage_table_w
        )


def _tempco(temp_c: FloatArray, ref_c: FloatArray, tc_per_k: FloatArray) -> FloatArray:
    """Linear temperature factor 1 + tc (T - T_ref) of Rds(on) and of loss tables."""
    return np.asarray(1.0 + tc_per_k * (temp_c - ref_c))


def _table_loss_w(params: PhaseLossParams, current_a: FloatArray) -> FloatArray:
    """Power-stage loss from the tables at |I| (..., n_phases), W at the table reference.

    Piecewise linear through the finite points, continued linearly beyond both ends,
    clipped at 0 W; zero for phases without a table.
    """
    out = np.zeros(current_a.shape)
    rows = np.flatnonzero(params.uses_table)
    if rows.size == 0:
        return out
    x, y = params.table_current_a[rows], params.table_loss_w[rows]
    mag = np.abs(current_a[..., rows])
    last = np.sum(~np.isnan(x), axis=1) - 2
    # Segment index: points at or below |I| (NaN padding never counts), kept on the table.
    seg = np.clip(np.sum(mag[..., None] >= x, axis=-1) - 1, 0, last)
    ph = np.arange(rows.size)
    x0, x1, y0, y1 = x[ph, seg], x[ph, seg + 1], y[ph, seg], y[ph, seg + 1]
    out[..., rows] = np.maximum(y0 + (mag - x0) * (y1 - y0) / (x1 - x0), 0.0)
    return out


def phase_losses(
    params: PhaseLossParams, current_a: npt.ArrayLike, temp_c: npt.ArrayLike
) -> LossBreakdown:
    """Loss terms of every phase at mean phase current ``current_a`` and junction ``temp_c``.

    ``current_a`` (A) and ``temp_c`` (degC) broadcast against (n_phases,), e.g. both of
    shape (n_samples, n_phases); every term has the broadcast shape.

    >>> p = PhaseLossParams.build(2, vin_v=12.0, vout_v=1.0, fsw_hz=500e3,
    ...     inductance_h=150e-9, dcr_ohm=0.2e-3, rds_high_ohm=4e-3, rds_low_ohm=1e-3,
    ...     rds_tc_per_k=0.004, rise_time_s=5e-9, fall_time_s=5e-9, gate_charge_c=40e-9,
    ...     drive_v=5.0, dead_time_s=20e-9, diode_drop_v=0.7, core_loss_w=0.3)
    >>> loss = phase_losses(p, [20.0, 30.0], 25.0)
    >>> np.round(loss.total_w, 3)
    array([1.88 , 3.047])
    >>> print(f"{loss.switching_w[0]:.3f} W switching, {loss.gate_w[0]:.3f} W gate")
    0.600 W switching, 0.100 W gate
    """
    current = np.asarray(current_a, dtype=np.float64)
    temp = np.asarray(temp_c, dtype=np.float64)
    if not np.all(np.isfinite(current)):
        raise ValueError("current_a must be finite")
    if not np.all(np.isfinite(temp)):
        raise ValueError("temp_c must be finite")
    try:
        shape = np.broadcast_shapes(current.shape, temp.shape, (params.n_phases,))
    except ValueError:
        raise ValueError(
            f"current_a and temp_c must broadcast to (..., {params.n_phases}) (n_phases)"
        ) from None
    current, temp = np.broadcast_to(current, shape), np.broadcast_to(temp, shape)
    copper = copper_resistance_ohm(1.0, temp, ref_temp_c=params.dcr_ref_c)
    terms = _breakdown(params, current, temp, copper)
    return replace(
        terms,
        gate_w=np.broadcast_to(terms.gate_w, shape).copy(),
        core_w=np.broadcast_to(terms.core_w, shape).copy(),
    )


def _breakdown(
    p: PhaseLossParams, current: FloatArray, temp: FloatArray, copper: FloatArray
) -> LossBreakdown:
    """The terms of :func:`phase_losses` from checked arrays: ``current`` and ``temp``
    broadcast against (n_phases,) and each other, ``copper`` the winding's DCR(T) / DCR_ref
    at ``temp``. Terms that do not depend on temperature keep the shape of ``current``, and
    the gate and core terms, which depend on neither, the shape (n_phases,)."""
    fixed = p._fixed
    rms_sq = triangle_rms_a(current, fixed.ripple_sq_12) ** 2
    mag = np.abs(current)
    formula = fixed.formula
    rds = rms_sq * _tempco(temp, p.rds_ref_c, p.rds_tc_per_k)
    half_vin, rise_fall = fixed.switching_v_s
    return LossBreakdown(
        high_side_w=np.where(formula, fixed.duty * rds * p.rds_high_ohm, 0.0),
        low_side_w=np.where(formula, fixed.off_duty * rds * p.rds_low_ohm, 0.0),
        switching_w=np.where(formula, half_vin * mag * rise_fall * p.fsw_hz, 0.0),
        gate_w=fixed.gate_w,
        dead_time_w=np.where(formula, fixed.dead_v * mag * p.dead_time_s * p.fsw_hz, 0.0),
        inductor_copper_w=rms_sq * p.dcr_ohm * copper,
        core_w=p.core_loss_w,
        stage_table_w=_table_loss_w(p, current) * _tempco(temp, p.table_ref_c, p.table_tc_per_k),
    )


def loss_coefficients(
    params: PhaseLossParams, current_a: npt.ArrayLike
) -> tuple[FloatArray, FloatArray]:
    """(p0_w, slope_w_per_k) with phase loss P(T) = p0 + slope T (T in degC) at ``current_a``.

    Every term of :func:`phase_losses` is affine in T, so sampling the total at 0 degC and at
    100 degC gives the line exactly (up to rounding). Shapes: ``current_a`` broadcast against
    (n_phases,).

    >>> p = PhaseLossParams.build(1, vin_v=12.0, vout_v=1.0, fsw_hz=500e3,
    ...     inductance_h=150e-9, dcr_ohm=0.2e-3, rds_low_ohm=1e-3, rds_tc_per_k=0.004)
    >>> p0, slope = loss_coefficients(p, [30.0])
    >>> print(f"{p0[0]:.4f} W + {slope[0] * 1e3:.4f} mW/K x T")
    0.9209 W + 4.0628 mW/K x T
    """
    current = np.asarray(current_a, dtype=np.float64)
    if not np.all(np.isfinite(current)):
        raise ValueError("current_a must be finite")
    if current.ndim == 0 or current.shape[-1] != params.n_phases:
        try:
            current = np.broadcast_to(
                current, np.broadcast_shapes(current.shape, (params.n_phases,))
            )
        except ValueError:
            raise ValueError(
                f"current_a and temp_c must broadcast to (..., {params.n_phases}) (n_phases)"
            ) from None
    # Both temperatures in one evaluation: stacked on a leading axis of two.
    lead = (2,) + (1,) * (current.ndim - 1)
    copper = params._fixed.copper_at_probes.reshape(*lead, params.n_phases)
    total = _breakdown(params, current, _PROBES_C.reshape(*lead, 1), copper).total_w
    at_zero, at_probe = total[0], total[1]
    return at_zero, (at_probe - at_zero) / _PROBE_C
