"""Switching-level model of one buck phase beside its rail, for invented fault captures (tests
and bench only).

The phase under test is a piecewise-linear circuit: its inductor current i_L, the input
capacitor voltage v_in (fed from a stiff bus through R_s) and the output capacitor voltage v_out,
with the other phases lumped into one current i_o that follows the output voltage with droop
(adaptive voltage positioning, common practice for multiphase processor rails) through a
first-order lag. Between switching instants the state obeys dx/dt = M x with x = [i_L, v_in,
v_out, i_o, 1]; each switch configuration has its own M, stepped exactly with the matrix
exponential (``scipy.linalg.expm``) on a fixed fine step. The controller is peak-current mode:
the high side turns on at each period start and off when i_L reaches the peak command (or at the
maximum duty).

Faults start at ``t_fault_s`` (before the trigger at t = 0):

* ``high_side_short``: the high side conducts for good; when the low side turns on the two shoot
  through (the switch node falls to a fraction of v_in, the input feeds v_in / R_st). The phase's
  input breaker opens at t = 0; the driver is disabled and i_L freewheels through the low-side
  body diode to zero.
* ``low_side_short``: the low side conducts for good; during each high-side on-time the two shoot
  through. The breaker opens at t = 0; the switch node stays at ground, i_L reverses, and the
  phase's ORing ideal diode opens ``oring_delay_s`` after the reverse current passes
  ``oring_reverse_a``.
* ``open_phase``: the phase's current path opens (i_L = 0 from then on); the driver keeps switching.
* ``gate_drive_loss``: both switches stay off; i_L freewheels through the body diode to zero.
* ``no_fault``: nothing happens to the phase (optionally the load steps at t_fault_s).

Measured channels get Gaussian noise of ``noise`` times each channel's scale (the phase's
baseline current for currents, nominal voltages for voltages, the baseline input current for
iin). Every value here is invented for tests.
"""

from __future__ import annotations

import io
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy.linalg import expm

F64 = npt.NDArray[np.float64]
FAULTS = ("high_side_short", "low_side_short", "open_phase", "gate_drive_loss", "no_fault")

# Switch configurations: (high side on, shoot-through fraction k or None, diode freewheel, open).
_NORMAL_HS, _NORMAL_LS, _SHOOT, _DIODE, _OFF, _SHOOT_LOW = range(6)


@dataclass(frozen=True)
class BuckCase:
    """One invented capture: the rail around the phase, the fault and the recording."""

    fault: str = "no_fault"
    vin_v: float = 12.0
    vout_v: float = 1.0
    inductance_h: float = 220e-9
    fsw_hz: float = 500e3
    phase_current_a: float = 20.0  # the phase's share before the fault (average)
    n_phases: int = 4
    c_in_f: float = 1.0e-3
    c_out_f: float = 2.0e-3
    r_source_ohm: float = 5e-3
    r_droop_ohm: float = 0.25e-3
    tau_loop_s: float = 10e-6
    r_shoot_ohm: float = 0.1  # shoot-through path incl. the breaker's sense resistor
    shoot_node_hs: float = 0.3  # switch node / v_in while shooting through, high side shorted
    shoot_node_ls: float = 0.05  # the same with the low side shorted
    diode_v: float = 0.7
    max_duty: float = 0.9
    t_fault_s: float = -5e-6  # fault onset; the breaker acts at t = 0
    oring_reverse_a: float = 5.0  # reverse current at which the ORing controller acts ...
    oring_delay_s: float = 0.5e-6  # ... and its turn-off delay
    load_step_a: float = 0.0  # no_fault only: a load step at t_fault_s
    t_start_s: float = -60e-6
    t_end_s: float = 40e-6
    sample_hz: float = 20e6
    substeps: int = 2  # simulation steps per sample
    noise: float = 0.0
    seed: int = 0


@dataclass(frozen=True)
class Capture:
    """Channels on the sample grid: t_s, vin_v, vout_v, iin_a (n,); current_a, switch_v (n, p)."""

    t_s: F64
    vin_v: F64
    vout_v: F64
    iin_a: F64
    current_a: F64
    switch_v: F64
    phase: int  # the phase under test


def _matrices(case: BuckCase, dt: float, extra_load_a: float = 0.0) -> list[F64]:
    """exp(M dt) for every configuration; x = [i_L, v_in, v_out, i_o, 1]."""
    ind, cin, cout = case.inductance_h, case.c_in_f, case.c_out_f
    i_others0 = (case.n_phases - 1) * case.phase_current_a
    i_load = case.n_phases * case.phase_current_a + extra_load_a
    duty_nom = case.vout_v / case.vin_v
    # per configuration: the switch node as a * v_in + c; the input draws h * i_L + s v_in / R_st
    nodes = {
        _NORMAL_HS: (1.0, 0.0, 1.0, 0.0),
        _NORMAL_LS: (0.0, 0.0, 0.0, 0.0),
        _SHOOT: (case.shoot_node_hs, 0.0, 1.0, 1.0),
        _SHOOT_LOW: (case.shoot_node_ls, 0.0, 0.0, 1.0),
        _DIODE: (0.0, -case.diode_v, 0.0, 0.0),
        _OFF: (0.0, 0.0, 0.0, 0.0),
    }
    out = []
    for config in range(6):
        a, c, h, s = nodes[config]
        m = np.zeros((5, 5))
        if config != _OFF:
            m[0, 1], m[0, 2], m[0, 4] = a / ind, -1.0 / ind, c / ind
        m[1, 0] = -h / cin
        m[1, 1] = (-1.0 / case.r_source_ohm - s / case.r_shoot_ohm) / cin
        m[1, 3] = -duty_nom / cin  # the other phases draw i_o * D from the input
        m[1, 4] = case.vin_v / case.r_source_ohm / cin
        m[2, 0], m[2, 3], m[2, 4] = 1.0 / cout, 1.0 / cout, -i_load / cout
        # droop: i_o follows i_others0 + (V_ref - v_out) / R_droop with the lag tau
        m[3, 2] = -1.0 / (case.r_droop_ohm * case.tau_loop_s)
        m[3, 3] = -1.0 / case.tau_loop_s
        m[3, 4] = (i_others0 + case.vout_v / case.r_droop_ohm) / case.tau_loop_s
        out.append(expm(m * dt))
    return out


def ripple_pp_a(case: BuckCase) -> float:
    """The textbook ripple the peak command is set from: (Vin - Vout) D / (L fsw), D = Vout/Vin."""
    duty = case.vout_v / case.vin_v
    return (case.vin_v - case.vout_v) * duty / (case.inductance_h * case.fsw_hz)


def _switch(case: BuckCase, fault_on: bool, tripped: bool, hs_on: bool) -> int:
    """The configuration of the phase's switches (before the current-dependent overrides)."""
    normal = _NORMAL_HS if hs_on else _NORMAL_LS
    if not fault_on or case.fault in ("no_fault", "open_phase"):
        return normal
    if case.fault == "high_side_short":
        return _DIODE if tripped else (_NORMAL_HS if hs_on else _SHOOT)
    if case.fault == "low_side_short":
        return _NORMAL_LS if tripped else (_SHOOT_LOW if hs_on else _NORMAL_LS)
    return _DIODE  # gate_drive_loss


def simulate(case: BuckCase) -> Capture:
    """Step the circuit from steady state through the fault; sample with noise."""
    dt = 1.0 / (case.sample_hz * case.substeps)
    steps = round((case.t_end_s - case.t_start_s) / dt)
    before = _matrices(case, dt)
    after = _matrices(case, dt, case.load_step_a) if case.load_step_a else before
    ripple = ripple_pp_a(case)
    peak = case.phase_current_a + ripple / 2.0
    period_steps = round(1.0 / (case.fsw_hz * dt))
    i_in0 = case.n_phases * case.phase_current_a * case.vout_v / case.vin_v
    x = np.array([case.phase_current_a - ripple / 2.0, case.vin_v - case.r_source_ohm * i_in0,
                  case.vout_v, (case.n_phases - 1) * case.phase_current_a, 1.0])  # fmt: skip
    states = np.empty((steps + 1, 4))
    node = np.empty(steps + 1)
    hs_on, dead = True, False
    oring_open_at = np.inf
    node_of = {_NORMAL_HS: 1.0, _SHOOT: case.shoot_node_hs, _SHOOT_LOW: case.shoot_node_ls}
    for k in range(steps + 1):
        t = case.t_start_s + k * dt
        u = k % period_steps
        if u == 0:
            hs_on = True
        elif hs_on and (x[0] >= peak or u >= case.max_duty * period_steps):
            hs_on = False
        fault_on = t >= case.t_fault_s
        config = _switch(case, fault_on, t >= 0.0, hs_on)
        if fault_on and case.fault == "open_phase":
            dead = True
        if case.fault == "low_side_short" and t >= 0.0 and x[0] < -case.oring_reverse_a:
            oring_open_at = min(oring_open_at, t + case.oring_delay_s)
            dead = dead or t >= oring_open_at
        if dead:
            x[0] = 0.0
        states[k] = x[:4]
        if dead and case.fault != "open_phase":
            node[k] = x[2]  # the idle node floats at the output voltage
        elif config == _DIODE:
            node[k] = -case.diode_v
        else:
            node[k] = x[1] * node_of.get(config, 0.0)
        x = (after if fault_on else before)[_OFF if dead else config] @ x
        if config == _DIODE and x[0] < 0.0:  # the body diode blocks reverse current
            x[0], dead = 0.0, True
    t_s = case.t_start_s + np.arange(steps + 1) * dt
    i_bus = (case.vin_v - states[:, 1]) / case.r_source_ohm
    keep = slice(None, None, case.substeps)
    return _measure(case, t_s[keep], states[keep], i_bus[keep], node[keep])


def _measure(case: BuckCase, t_s: F64, states: F64, i_bus: F64, node: F64) -> Capture:
    """Sampled channels with noise; the other phases share i_o, each with its own interleaved
    triangle ripple."""
    rng = np.random.default_rng(case.seed)
    p = case.n_phases
    ripple = ripple_pp_a(case)
    duty = case.vout_v / case.vin_v
    shifts = np.arange(1, p) / p
    u = np.mod(t_s[:, None] * case.fsw_hz - shifts[None, :], 1.0)
    tri = ripple * (np.where(u < duty, u / duty, (1.0 - u) / (1.0 - duty)) - 0.5)
    others = states[:, 3:4] / (p - 1) + tri
    current = np.concatenate([states[:, :1], others], axis=1)
    node_all = np.concatenate([node[:, None], case.vin_v * (u < duty)], axis=1)
    i_in0 = p * case.phase_current_a * duty
    scale = case.noise

    def noisy(x: F64, size: float) -> F64:
        return np.asarray(x + rng.normal(0.0, scale * size, x.shape), dtype=np.float64)

    return Capture(
        t_s=t_s,
        vin_v=noisy(states[:, 1], case.vin_v),
        vout_v=noisy(states[:, 2], case.vout_v),
        iin_a=noisy(i_bus, i_in0),
        current_a=noisy(current, case.phase_current_a),
        switch_v=noisy(node_all, case.vin_v),
        phase=0,
    )


def random_case(fault: str, rng: np.random.Generator, *, noise: float) -> BuckCase:
    """A capture drawn from the invented population the classifier is checked on: phase share
    12..28 A, L 150..330 nH, breaker 2..6 us after the fault, ORing acting at 3..8 A reverse
    after 0.3..1 us, half of
    the no-fault captures with a +-25 % load step."""
    step = 0.0
    if fault == "no_fault" and rng.random() < 0.5:
        step = float(rng.choice([-1.0, 1.0]) * 0.25 * 4 * 20.0)
    return BuckCase(
        fault=fault,
        inductance_h=float(rng.uniform(150e-9, 330e-9)),
        phase_current_a=float(rng.uniform(12.0, 28.0)),
        t_fault_s=-float(rng.uniform(2e-6, 6e-6)),
        oring_reverse_a=float(rng.uniform(3.0, 8.0)),
        oring_delay_s=float(rng.uniform(0.3e-6, 1.0e-6)),
        load_step_a=step,
        noise=noise,
        seed=int(rng.integers(2**31)),
    )


def columns(
    capture: Capture, phase: int, *, iin: bool = True, switch: bool = True
) -> dict[str, F64]:
    """The capture as upload columns, the phase under test moved to index ``phase``."""
    p = capture.current_a.shape[1]
    order = np.roll(np.arange(p), phase)  # column ``phase`` gets the phase under test
    out = {"t_s": capture.t_s, "vin_v": capture.vin_v, "vout_v": capture.vout_v}
    if iin:
        out["iin_a"] = capture.iin_a
    out |= {f"i{k}_a": capture.current_a[:, order[k]] for k in range(p)}
    if switch:
        out |= {f"sw{k}_v": capture.switch_v[:, order[k]] for k in range(p)}
    return out


def as_csv(cols: dict[str, F64], fmt: str = "%.9g") -> bytes:
    table = np.column_stack(list(cols.values()))
    buf = io.StringIO()
    np.savetxt(buf, table, delimiter=",", header=",".join(cols), comments="", fmt=fmt)
    return buf.getvalue().encode()


def as_npz(cols: dict[str, F64]) -> bytes:
    buf = io.BytesIO()
    np.savez_compressed(buf, **cols)  # type: ignore[arg-type]
    return buf.getvalue()


def as_npy(cols: dict[str, F64]) -> bytes:
    table = np.zeros(next(iter(cols.values())).size, dtype=[(k, "<f8") for k in cols])
    for name, values in cols.items():
        table[name] = values
    buf = io.BytesIO()
    np.save(buf, table)
    return buf.getvalue()
