"""Junction temperature estimation: a Kalman filter over the coupled thermal network.

Temperature sensors sit beside the junctions and sample slowly; the filter tracks every node
of a :class:`~phaseward.physics.thermal.ThermalNetwork` from the phase losses and the readings.

State
-----
x (n_states,) in degC: the n_nodes node temperatures of the network, followed -- when a sensor
lag is modelled -- by one sensor temperature per phase that follows its junction as a
first-order lag, dT_s/dt = (T_j - T_s) / tau_sensor. In continuous time

    dx/dt = Ac x + Bc [P; T_amb],
    Ac = [[-C^-1 (G + diag(g_amb)), 0], [S / tau, -I / tau]],   Bc = [[C^-1 E, C^-1 g_amb], [0, 0]]

(E places phase values at junction nodes, S picks the junction of each phase).

Discretisation
--------------
Over a constant step dt with the inputs held (zero-order hold) the block exponential
``expm([[Ac, Bc], [0, 0]] dt) = [[F, Bd], [0, I]]`` gives the exact step (Van Loan, "Computing
integrals involving the matrix exponential", IEEE Trans. Automatic Control 23(3), 1978; the
construction behind ``scipy.signal.cont2discrete(method="zoh")``). F, Bd are computed once per
(network, dt, sensor lag) and cached.

Loss feedback (the choice made here): the loss of step k is evaluated at the junction
temperature at the start of the step and held over it, P_k = p0_k + s_k T_j(t_k) -- the same
hold as :func:`~phaseward.physics.thermal.simulate_c`. The loss is affine in T_j, so this is
not a linearisation: the transition of step k is exactly

    x_{k+1} = F_k x_k + Bp p0_k + ba T_amb,k + w_k,   F_k = F + Bp diag(s_k) S,

a rank-n_phases change of the cached F (Bp, ba: the loss and ambient columns of Bd).

Noise
-----
Process noise: the unmodelled part of each phase loss, a zero-mean random power held over each
step with standard deviation ``process_noise_w`` (piecewise-constant white noise; Bar-Shalom,
Li and Kirubarajan, *Estimation with Applications to Tracking and Navigation*, ch. 6, from
memory), so Q = Bp diag(sigma_w^2) Bp^T in K^2. Measurement: the reading of phase p taken at
the end of step k is y = T_sensor,p(t_{k+1}) + offset_p + v, v ~ N(0, sensor_noise_k^2), where
the sensor temperature is the junction node itself, or the phase's lag state when
``sensor_tau_s`` is given. A NaN reading drops that phase's row of H for the step.

Each step predicts over [t_k, t_{k+1}] and then updates with the readings of row k; the
covariance update is in Joseph form, (I - K H) P (I - K H)^T + K R K^T, then symmetrised.
The normalised innovation of each reading, (y - offset - predicted sensed temperature) /
sqrt(S_pp) with S = H P- H^T + R, is reported per step (NaN where there is no reading).

Steady-state fast path
----------------------
With the step, the loss slope s and the sensor set fixed, the covariance recursion is the
time-invariant Riccati recursion and converges to the fixed point of
:mod:`~phaseward.physics.steady_gain` (``scipy.linalg.solve_discrete_are``); with that gain the
mean follows a linear recurrence with a constant matrix, evaluated for a whole stretch as array
operations. The loss slope enters the transition (F_k above), so the fixed point belongs to one
slope: the fast path covers consecutive steps whose slope row is *equal* (the same currents,
e.g. a held load or an isolated phase; any measured change of current changes the slope) and
whose readings are all present (a NaN reading changes H). A step k takes it when the stretch
from k holds at least ``MIN_STEADY_STEPS`` such steps in this call, one full step from the
covariance before k moves it by at most twice ``STEADY_RTOL`` (relative to its largest
variance; a cheap test that keeps the Riccati solve away from steps that cannot pass), and that
covariance is within ``STEADY_RTOL`` of the steady posterior covariance for slope s_k. The
covariance after a fast stretch is the steady one itself. Everywhere else the full filter runs.

Batching: the stretch length makes the choice depend on how samples are cut into calls (one
call of 100 equal steps goes fast, a hundred calls of one do not), so the guarantee is
agreement, not identity: both paths follow the same filter, and from a covariance within
``STEADY_RTOL`` of the steady one they differ by about 1e-8 K on the means and 1e-12
(relative) on the covariance (tests/unit/physics/test_estimator_steady.py), far inside the
rounding the batching-invariance tests of the live state tolerate (1e-7).

Failure policy: invalid arguments raise ValueError naming the argument; an estimate that
leaves float64 range (the loss feedback grows without bound) raises
:class:`~phaseward.physics.thermal.ThermalRunaway`.
"""

from dataclasses import dataclass
from functools import lru_cache
from typing import NamedTuple

import numpy as np
import numpy.typing as npt
from scipy import linalg
from scipy.linalg import lapack

from phaseward.physics.steady_gain import SteadyGain, linear_recurrence, steady_gain
from phaseward.physics.thermal import ThermalNetwork, ThermalRunaway

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]

_SYMMETRY_RTOL = 1e-9  # relative asymmetry tolerated in a supplied covariance (rounding only)
# Relative distance from the steady covariance below which the steady gain replaces the full
# filter (module docstring): the gain then differs by about this fraction, far below 1e-6 K
# on the means (tests/unit/physics/test_estimator_steady.py measures it).
STEADY_RTOL = 1e-12
# Fewest steps a stretch must hold in one call before the steady gain is sought: a Riccati
# solve not yet cached costs as much as about a hundred full steps on a 12-phase network
# (bench/estimator_batch.py), so shorter stretches, and single-sample requests, stay on the
# full filter.
MIN_STEADY_STEPS = 32


def _array(
    name: str,
    value: npt.ArrayLike,
    shape: tuple[int, ...],
    *,
    positive: bool = False,
    nonnegative: bool = False,
    allow_nan: bool = False,
) -> FloatArray:
    """``value`` broadcast to ``shape`` as a float64 copy; ValueError naming ``name``."""
    arr = np.array(value, dtype=np.float64)
    if arr.shape != shape:
        try:
            arr = np.array(np.broadcast_to(arr, shape))
        except ValueError:
            raise ValueError(f"{name} must broadcast to shape {shape}") from None
    bad = np.isinf(arr) if allow_nan else ~np.isfinite(arr)
    if np.any(bad):
        note = " (NaN marks a missing value)" if allow_nan else ""
        raise ValueError(f"{name} must be finite{note}")
    if positive and not np.all(arr > 0.0):
        raise ValueError(f"{name} must be > 0")
    if nonnegative and not np.all(arr >= 0.0):
        raise ValueError(f"{name} must be >= 0")
    return arr


def _readonly(arr: FloatArray) -> FloatArray:
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, eq=False)
class EstimatorState:
    """Gaussian estimate of the state: mean in degC and covariance in K^2.

    mean_c: (n_states,); cov_k2: (n_states, n_states), symmetric positive semi-definite.
    n_states = n_nodes, or n_nodes + n_phases with sensor-lag states (see the module docstring).
    Arrays are stored as read-only copies.

    >>> s = EstimatorState(np.array([25.0, 25.0]), np.eye(2))
    >>> s.n_states, s.mean_c.flags.writeable
    (2, False)
    """

    mean_c: FloatArray
    cov_k2: FloatArray

    def __post_init__(self) -> None:
        mean = np.array(self.mean_c, dtype=np.float64)
        if mean.ndim != 1 or mean.size == 0 or not np.all(np.isfinite(mean)):
            raise ValueError("mean_c must be a finite array of shape (n_states,)")
        n = mean.size
        if np.ndim(self.cov_k2) != 2:
            raise ValueError(f"cov_k2 must have shape (n_states, n_states) = ({n}, {n})")
        cov = _array("cov_k2", self.cov_k2, (n, n))
        scale = float(np.abs(cov).max(initial=0.0))
        if np.any(np.abs(cov - cov.T) > _SYMMETRY_RTOL * scale) or np.any(np.diag(cov) < 0.0):
            raise ValueError("cov_k2 must be symmetric with a non-negative diagonal")
        object.__setattr__(self, "mean_c", _readonly(mean))
        object.__setattr__(self, "cov_k2", _readonly(0.5 * (cov + cov.T)))

    @property
    def n_states(self) -> int:
        """Number of states."""
        return int(self.mean_c.size)


@dataclass(frozen=True, eq=False)
class DiscreteModel:
    """The filter's model for one network, step and sensor set-up; build it with
    :func:`discrete_model`.

    transition: (n_states, n_states) F of the loss-free network (loss slope enters per step).
    loss_input_k_per_w: (n_states, n_phases) Bp, temperature change per watt held over a step.
    ambient_input: (n_states,) ba, temperature change per kelvin of ambient held over a step.
    process_cov_k2: (n_states, n_states) Q.
    junction_state: (n_phases,) state index of each junction (the network's junction nodes).
    sensor_state: (n_phases,) state index each phase's reading observes.
    sensor_var_k2: (n_phases,) reading noise variance; sensor_offset_k: (n_phases,) offset.
    dt_s: the step.
    """

    transition: FloatArray
    loss_input_k_per_w: FloatArray
    ambient_input: FloatArray
    process_cov_k2: FloatArray
    junction_state: IntArray
    sensor_state: IntArray
    sensor_var_k2: FloatArray
    sensor_offset_k: FloatArray
    dt_s: float

    @property
    def n_states(self) -> int:
        """Number of states."""
        return int(self.ambient_input.size)

    @property
    def n_phases(self) -> int:
        """Number of phases."""
        return int(self.junction_state.size)


@lru_cache(maxsize=32)
def _discretise(
    net: ThermalNetwork, dt_s: float, sensor_tau_s: tuple[float, ...] | None
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """(F, Bp, ba) of the zero-order-hold step (module docstring); read-only, cached.

    ``net`` hashes by identity (the network is immutable), so a network reused across calls
    reuses its matrices.
    """
    n, n_ph = net.n_nodes, net.n_phases
    n_lag = 0 if sensor_tau_s is None else n_ph
    size = n + n_lag
    inv_c = 1.0 / net.capacitance_j_per_k
    block = np.zeros((size + n_ph + 1, size + n_ph + 1))
    a = net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)
    block[:n, :n] = -inv_c[:, None] * a
    block[net.junction_node, size + np.arange(n_ph)] = inv_c[net.junction_node]
    block[:n, size + n_ph] = inv_c * net.ambient_conductance_w_per_k
    if sensor_tau_s is not None:
        rate = 1.0 / np.array(sensor_tau_s)
        lag = n + np.arange(n_ph)
        block[lag, net.junction_node] = rate
        block[lag, lag] = -rate
    step = linalg.expm(block * dt_s)
    return (
        _readonly(np.ascontiguousarray(step[:size, :size])),
        _readonly(np.ascontiguousarray(step[:size, size : size + n_ph])),
        _readonly(np.ascontiguousarray(step[:size, size + n_ph])),
    )


def discrete_model(
    net: ThermalNetwork,
    dt_s: float,
    *,
    process_noise_w: npt.ArrayLike,
    sensor_noise_k: npt.ArrayLike,
    sensor_tau_s: npt.ArrayLike | None = None,
    sensor_offset_k: npt.ArrayLike = 0.0,
) -> DiscreteModel:
    """Filter model over a constant step ``dt_s`` > 0 (s); see the module docstring.

    process_noise_w: float or (n_phases,) >= 0, std of the unmodelled loss, W.
    sensor_noise_k: float or (n_phases,) > 0, std of a reading, K.
    sensor_tau_s: None (the sensor reads the junction node) or float / (n_phases,) > 0, the
        sensor's first-order lag time constant in s (adds one state per phase).
    sensor_offset_k: float or (n_phases,), reading minus the sensed temperature, K.

    >>> from phaseward.physics.thermal import CauerStages, build_coupled_network
    >>> net = build_coupled_network([CauerStages(np.array([2.0]), np.array([0.5]))],
    ...                             board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> m = discrete_model(net, 1.0, process_noise_w=0.1, sensor_noise_k=0.5, sensor_tau_s=3.0)
    >>> m.n_states, m.sensor_state.tolist()
    (3, [2])
    >>> print(f"{m.transition[2, 2]:.4f}")  # the lag state alone decays as exp(-1/3)
    0.7165
    """
    dt = float(_array("dt_s", dt_s, (), positive=True))
    n_ph = net.n_phases
    noise_w = _array("process_noise_w", process_noise_w, (n_ph,), nonnegative=True)
    noise_k = _array("sensor_noise_k", sensor_noise_k, (n_ph,), positive=True)
    offset = _array("sensor_offset_k", sensor_offset_k, (n_ph,))
    tau = None
    if sensor_tau_s is not None:
        tau = tuple(_array("sensor_tau_s", sensor_tau_s, (n_ph,), positive=True).tolist())
    transition, loss_input, ambient_input = _discretise(net, dt, tau)
    sensor_state = np.array(net.junction_node if tau is None else net.n_nodes + np.arange(n_ph))
    sensor_state.setflags(write=False)
    scaled = loss_input * noise_w
    return DiscreteModel(
        transition=transition,
        loss_input_k_per_w=loss_input,
        ambient_input=ambient_input,
        process_cov_k2=_readonly(scaled @ scaled.T),
        junction_state=net.junction_node,
        sensor_state=sensor_state,
        sensor_var_k2=_readonly(noise_k**2),
        sensor_offset_k=_readonly(offset),
        dt_s=dt,
    )


def initial_state(
    net: ThermalNetwork,
    temps_c: npt.ArrayLike,
    *,
    std_k: npt.ArrayLike,
    sensor_lag: bool = False,
) -> EstimatorState:
    """Uncorrelated starting estimate: node temperatures ``temps_c`` with std ``std_k``.

    temps_c: float (every node) or (n_nodes,) degC; std_k: float or (n_nodes,) >= 0, K.
    With ``sensor_lag`` the phases' sensor states are appended, each starting at its
    junction's mean and std (use it with ``sensor_tau_s`` in :func:`kalman_run`).

    >>> from phaseward.physics.thermal import CauerStages, build_coupled_network
    >>> net = build_coupled_network([CauerStages(np.array([2.0]), np.array([0.5]))],
    ...                             board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> s = initial_state(net, [30.0, 26.0], std_k=2.0, sensor_lag=True)
    >>> s.mean_c.tolist(), np.diag(s.cov_k2).tolist()
    ([30.0, 26.0, 30.0], [4.0, 4.0, 4.0])
    """
    mean = _array("temps_c", temps_c, (net.n_nodes,))
    std = _array("std_k", std_k, (net.n_nodes,), nonnegative=True)
    if sensor_lag:
        mean = np.concatenate([mean, mean[net.junction_node]])
        std = np.concatenate([std, std[net.junction_node]])
    return EstimatorState(mean, np.diag(std**2))


START_RISE_STD = 0.5  # std of the fraction of the steady rise reached at the first sample
START_COMMON_STD_K = 5.0  # K, std of an offset shared by every node (warm from before)
START_NODE_STD_K = 2.0  # K, std of each node (and sensor state) on its own


def initial_from_readings(
    net: ThermalNetwork,
    ambient_c: float,
    steady_c: npt.ArrayLike,
    measured_c: npt.ArrayLike,
    *,
    sensor_noise_k: npt.ArrayLike,
    sensor_offset_k: npt.ArrayLike = 0.0,
    sensor_lag: bool = False,
) -> EstimatorState:
    """Starting estimate from a rail's first sample: a prior from physics, conditioned on the
    first temperature readings.

    Prior (a choice, stated): T = T_amb + a (T_ss - T_amb) + c + e, with T_ss the steady state
    of the first sample's losses (``steady_c``, (n_nodes,)), a ~ N(1/2, (1/2)^2) the unknown
    fraction of that rise reached (just started .. long settled), c ~ N(0, 5^2 K^2) an offset
    shared by every node (the rail warm from before, or ambient read off) and e ~ N(0, 2^2 K^2)
    each node's own deviation; with ``sensor_lag`` each sensor state is its junction plus its
    own N(0, 2^2 K^2). The readings (``measured_c``, (n_phases,), NaN: none) then update it as
    a Kalman measurement would (Gaussian conditioning), so the nodes move together with what
    the sensors say and the reported std is the posterior's.

    >>> from phaseward.physics.thermal import CauerStages, build_coupled_network
    >>> net = build_coupled_network([CauerStages(np.array([2.0]), np.array([0.5]))],
    ...                             board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> s = initial_from_readings(net, 25.0, [40.0, 30.0], [32.0], sensor_noise_k=0.5)
    >>> print(f"{s.mean_c[0]:.1f} +- {np.sqrt(s.cov_k2[0, 0]):.2f} degC")
    32.0 +- 0.50 degC
    >>> bool(25.0 < s.mean_c[1] < 30.0)  # the board follows: cooler than the steady state
    True
    """
    n, n_ph = net.n_nodes, net.n_phases
    ambient = float(_array("ambient_c", ambient_c, ()))
    rise = _array("steady_c", steady_c, (n,)) - ambient
    reading = _array("measured_c", measured_c, (n_ph,), allow_nan=True)
    var = _array("sensor_noise_k", sensor_noise_k, (n_ph,), positive=True) ** 2
    offset = _array("sensor_offset_k", sensor_offset_k, (n_ph,))
    size = n + (n_ph if sensor_lag else 0)
    # Every state as a linear map of the independent draws (a, c, e_nodes, e_sensors).
    loading = np.zeros((size, 2 + size))
    loading[:n, 0] = START_RISE_STD * rise
    loading[:, 1] = START_COMMON_STD_K
    loading[:n, 2 : 2 + n] = START_NODE_STD_K * np.eye(n)
    mean = np.concatenate([ambient + 0.5 * rise, np.zeros(size - n)])
    if sensor_lag:
        mean[n:] = mean[net.junction_node]
        loading[n:, :] = loading[net.junction_node, :]
        loading[n:, 2 + n :] = START_NODE_STD_K * np.eye(n_ph)
    cov = loading @ loading.T
    sensor = np.array(net.junction_node if not sensor_lag else n + np.arange(n_ph))
    return EstimatorState(*_condition(mean, cov, sensor, var, offset, reading)[:2])


def _transition(model: DiscreteModel, slope_w_per_k: FloatArray) -> FloatArray:
    """F_k = F + Bp diag(s_k) S (module docstring)."""
    f = np.array(model.transition)
    f[:, model.junction_state] += model.loss_input_k_per_w * slope_w_per_k
    return f


def _predict(
    model: DiscreteModel,
    mean: FloatArray,
    cov: FloatArray,
    slope_w_per_k: FloatArray,
    drive_c: FloatArray,
) -> tuple[FloatArray, FloatArray]:
    """One prediction with F_k; ``drive_c`` = Bp p0_k + ba T_amb,k.

    :class:`ThermalRunaway` when the prediction leaves float64 range.
    """
    f = _transition(model, slope_w_per_k)
    with np.errstate(over="ignore", invalid="ignore"):
        mean, cov = f @ mean + drive_c, f @ cov @ f.T + model.process_cov_k2
        finite = np.isfinite(mean.sum() + np.trace(cov))  # the trace bounds every covariance
    if not finite:
        raise ThermalRunaway(
            "the estimate left float64 range: the loss feedback grows without bound",
            np.array(True),
        )
    return mean, cov


def _update(
    model: DiscreteModel, mean: FloatArray, cov: FloatArray, reading_c: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Measurement update with the finite readings (n_phases,) only; Joseph form. Returns the
    mean, the covariance and the normalised innovations (n_phases,)."""
    return _condition(
        mean, cov, model.sensor_state, model.sensor_var_k2, model.sensor_offset_k, reading_c
    )


def _condition(
    mean: FloatArray,
    cov: FloatArray,
    sensor_state: IntArray,
    sensor_var_k2: FloatArray,
    sensor_offset_k: FloatArray,
    reading_c: FloatArray,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Condition N(mean, cov) on the finite readings, reading p = state[sensor_state[p]] +
    offset_p + N(0, var_p); Joseph form. Also returns each reading's innovation over its
    standard deviation, sqrt(S_pp) (NaN where there is no reading)."""
    seen = np.isfinite(reading_c)
    z = np.full(reading_c.shape, np.nan)
    if not np.any(seen):
        return mean, cov, z
    rows = sensor_state[seen]
    var = sensor_var_k2[seen]
    cross = cov[rows]  # H P, with H picking ``rows``
    innovation_cov = cross[:, rows]
    innovation_cov.flat[:: rows.size + 1] += var  # S = H P H^T + R
    # K = P H^T S^-1 = (S^-1 H P)^T, S symmetric positive definite: LAPACK's Cholesky solve
    # called bare (this runs once per sample; numpy's LU costs twice as much, scipy's checked
    # wrapper more). LU where S has lost definiteness (a runaway's rounding), as before: the
    # state's own check after the run reports the runaway.
    _, solved, info = lapack.dposv(innovation_cov, cross)
    gain = (solved if info == 0 else np.linalg.solve(innovation_cov, cross)).T
    innovation = reading_c[seen] - sensor_offset_k[seen] - mean[rows]
    z[seen] = innovation / np.sqrt(np.diag(innovation_cov))
    # Joseph form (I - K H) P (I - K H)^T + K R K^T, its products taken without the zeros of
    # I - K H: the same sums, a quarter of the multiplications on a 12-phase network.
    left = cov - gain @ cross
    cov = left - left[:, rows] @ gain.T + (gain * var) @ gain.T
    return mean + gain @ innovation, 0.5 * (cov + cov.T), z


def _check_state(model: DiscreteModel, state: EstimatorState) -> None:
    if state.n_states != model.n_states:
        raise ValueError(
            f"state must have n_states = {model.n_states} for this model "
            "(n_nodes, plus n_phases with a sensor lag)"
        )


def kalman_step(
    model: DiscreteModel,
    state: EstimatorState,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: float,
    measured_c: npt.ArrayLike,
) -> EstimatorState:
    """One step: predict over ``model.dt_s`` with the losses held, then update with readings.

    p0_w (W), slope_w_per_k (W/K), measured_c (degC, NaN = no reading): (n_phases,);
    ambient_c: degC held over the step. The readings are taken at the end of the step.

    >>> from phaseward.physics.thermal import CauerStages, build_coupled_network
    >>> net = build_coupled_network([CauerStages(np.array([2.0]), np.array([0.5]))],
    ...                             board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> m = discrete_model(net, 1.0, process_noise_w=0.0, sensor_noise_k=0.5)
    >>> s = initial_state(net, 25.0, std_k=1.0)
    >>> s = kalman_step(m, s, [2.0], [0.05], 25.0, [np.nan])  # no reading: prediction only
    >>> np.round(s.mean_c, 3).tolist()  # 2 W + 0.05 W/K x 25 degC held for 1 s
    [29.171, 25.217]
    >>> s = kalman_step(m, s, [2.0], [0.05], 25.0, [29.0])  # one more second, then a reading
    >>> print(f"{s.mean_c[0]:.3f} +- {np.sqrt(s.cov_k2[0, 0]):.3f} degC")
    29.732 +- 0.408 degC
    """
    _check_state(model, state)
    n_ph = model.n_phases
    p0 = _array("p0_w", p0_w, (n_ph,))
    slope = _array("slope_w_per_k", slope_w_per_k, (n_ph,))
    ambient = float(_array("ambient_c", ambient_c, ()))
    reading = _array("measured_c", measured_c, (n_ph,), allow_nan=True)
    drive = model.loss_input_k_per_w @ p0 + model.ambient_input * ambient
    mean, cov = _predict(model, state.mean_c, state.cov_k2, slope, drive)
    return EstimatorState(*_update(model, mean, cov, reading)[:2])


class KalmanTrace(NamedTuple):
    """Result of :func:`kalman_run` (unpacks as ``final, means_c, junction_std_k,
    innovation_z``).

    final: the estimate after the last step; means_c: (n_steps + 1, n_states) degC, row 0 the
    starting mean; junction_std_k: (n_steps + 1, n_phases) K, std of each junction estimate;
    innovation_z: (n_steps, n_phases) normalised innovation of each reading, (reading - offset
    - predicted sensed temperature) / sqrt(S_pp) with S = H P- H^T + R the innovation
    covariance before the update (NaN where no reading). For a filter whose model matches the
    data it is N(0, 1) and white (Bar-Shalom et al., ch. 5.4, from memory): what a sequential
    test for a persistent model error watches.
    """

    final: EstimatorState
    means_c: FloatArray
    junction_std_k: FloatArray
    innovation_z: FloatArray


@lru_cache(maxsize=64)
def _steady(
    net: ThermalNetwork,
    dt_s: float,
    sensor_tau_s: tuple[float, ...] | None,
    process_noise_w: tuple[float, ...],
    sensor_noise_k: tuple[float, ...],
    slope_w_per_k: tuple[float, ...],
) -> SteadyGain | None:
    """The steady-state filter for one model and loss slope; cached (the Riccati solve costs
    tens of ms on a 12-phase network). None where there is none, and where one full step from
    its covariance moves it by more than ``STEADY_RTOL`` (so a state left at the steady
    covariance, stored and read back, passes the fast-path test of :func:`kalman_run` again).
    """
    model = discrete_model(
        net, dt_s, process_noise_w=process_noise_w, sensor_noise_k=sensor_noise_k,
        sensor_tau_s=sensor_tau_s,
    )  # fmt: skip
    slope = np.array(slope_w_per_k)
    found = steady_gain(
        _transition(model, slope), model.process_cov_k2, model.sensor_state, model.sensor_var_k2
    )
    if found is None:
        return None
    post = found.post_cov
    step = _predict(model, np.zeros(model.n_states), post, slope, np.zeros(model.n_states))
    moved = _update(model, *step, np.zeros(model.n_phases))[1] - post
    return found if np.max(np.abs(moved)) <= STEADY_RTOL * np.max(np.diag(post)) else None


def kalman_run(
    net: ThermalNetwork,
    state: EstimatorState,
    dt_s: float,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: npt.ArrayLike,
    measured_c: npt.ArrayLike,
    *,
    process_noise_w: npt.ArrayLike,
    sensor_noise_k: npt.ArrayLike,
    sensor_tau_s: npt.ArrayLike | None = None,
    sensor_offset_k: npt.ArrayLike = 0.0,
) -> KalmanTrace:
    """Filter a trace of constant step ``dt_s``: step k predicts with the losses of row k held
    over [t_k, t_{k+1}], then updates with the readings of row k (taken at t_{k+1}).

    p0_w (W), slope_w_per_k (W/K), measured_c (degC, NaN = no reading): (n_steps, n_phases);
    ambient_c: float or (n_steps,) degC held over each step; ``state``: the estimate at t_0
    (:func:`initial_state`, with ``sensor_lag=True`` when ``sensor_tau_s`` is given). Noise
    and sensor arguments as in :func:`discrete_model`. The recursion runs one small set of
    matrix products per step, except on stretches where the filter has converged, which run
    as array operations with the steady gain (module docstring, "Steady-state fast path");
    F, Bp, ba and the steady gains are cached per (network, dt, sensor lag).

    >>> from phaseward.physics.thermal import CauerStages, build_coupled_network
    >>> net = build_coupled_network([CauerStages(np.array([2.0]), np.array([0.5]))],
    ...                             board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> start = initial_state(net, 25.0, std_k=5.0, sensor_lag=True)
    >>> n = 400  # 2 W held: the junction settles at 25 + 2 x (2 + 1) = 31 degC
    >>> final, means, std, z = kalman_run(net, start, 0.5, np.full((n, 1), 2.0),
    ...     np.zeros((n, 1)), 25.0, np.full((n, 1), 31.0), process_noise_w=0.05,
    ...     sensor_noise_k=0.3, sensor_tau_s=2.0)
    >>> means.shape, std.shape, round(float(means[-1, 0]), 2), bool(std[-1, 0] < std[0, 0])
    ((401, 3), (401, 1), 31.0, True)
    >>> z.shape, bool(abs(z[-1, 0]) < 0.1)  # settled on the readings: nothing unexpected
    ((400, 1), True)
    """
    filt = _filter(net, dt_s, process_noise_w, sensor_noise_k, sensor_tau_s, sensor_offset_k)
    _check_state(filt.model, state)
    if np.ndim(p0_w) != 2 or np.shape(p0_w)[0] == 0:
        raise ValueError("p0_w must have shape (n_steps, n_phases) with n_steps >= 1")
    shape = (np.shape(p0_w)[0], net.n_phases)
    if np.shape(p0_w) != shape:
        raise ValueError(f"p0_w must have shape (n_steps, n_phases) with n_phases={shape[1]}")
    p0 = _array("p0_w", p0_w, shape)
    for name, value in (("slope_w_per_k", slope_w_per_k), ("measured_c", measured_c)):
        if np.shape(value) != shape:
            raise ValueError(f"{name} must have the shape of p0_w, (n_steps, n_phases)")
    slope = _array("slope_w_per_k", slope_w_per_k, shape)
    reading = _array("measured_c", measured_c, shape, allow_nan=True)
    if np.ndim(ambient_c) not in (0, 1):
        raise ValueError("ambient_c must be a float or have shape (n_steps,)")
    ambient = _array("ambient_c", ambient_c, shape[:1])
    return filter_run(filt, state.mean_c, state.cov_k2, p0, slope, ambient, reading)


class Filter(NamedTuple):
    """A filter model and the key its steady gains are cached under (:func:`filter_for`)."""

    model: DiscreteModel
    steady_key: tuple[
        ThermalNetwork, float, tuple[float, ...] | None, tuple[float, ...], tuple[float, ...]
    ]


@lru_cache(maxsize=64)
def filter_for(
    net: ThermalNetwork,
    dt_s: float,
    *,
    process_noise_w: float,
    sensor_noise_k: float,
    sensor_tau_s: float | None,
    sensor_offset_k: float,
) -> Filter:
    """The filter :func:`kalman_run` builds for scalar noise and sensor arguments, built (and
    its arguments checked) once per set: for callers that filter every sample of a rail."""
    return _filter(net, dt_s, process_noise_w, sensor_noise_k, sensor_tau_s, sensor_offset_k)


def _filter(
    net: ThermalNetwork,
    dt_s: float,
    process_noise_w: npt.ArrayLike,
    sensor_noise_k: npt.ArrayLike,
    sensor_tau_s: npt.ArrayLike | None,
    sensor_offset_k: npt.ArrayLike,
) -> Filter:
    """The discrete model for these arguments, and its key for the steady gains."""
    model = discrete_model(
        net,
        dt_s,
        process_noise_w=process_noise_w,
        sensor_noise_k=sensor_noise_k,
        sensor_tau_s=sensor_tau_s,
        sensor_offset_k=sensor_offset_k,
    )
    n_ph = net.n_phases
    tau = None if sensor_tau_s is None else _tuple(sensor_tau_s, n_ph)
    noise = (_tuple(process_noise_w, n_ph), _tuple(sensor_noise_k, n_ph))
    return Filter(model, (net, model.dt_s, tau, *noise))


def filter_run(
    filt: Filter,
    mean_c: FloatArray,
    cov_k2: FloatArray,
    p0: FloatArray,
    slope: FloatArray,
    ambient: FloatArray,
    reading: FloatArray,
) -> KalmanTrace:
    """:func:`kalman_run` on arguments it has checked, or that are known good: the starting
    mean (n_states,) and symmetric covariance, and float64 arrays p0, slope, reading
    (n_steps, n_phases) and ambient (n_steps,), finite except NaN readings."""
    model = filt.model
    shape = p0.shape
    # A trace shorter than MIN_STEADY_STEPS never takes the fast path: every stretch empty.
    stretch_end = (
        _stretch_ends(slope, np.all(np.isfinite(reading), axis=1))
        if shape[0] >= MIN_STEADY_STEPS
        else np.arange(shape[0])
    )
    means = np.empty((shape[0] + 1, model.n_states))
    variances = np.empty((shape[0] + 1, model.n_states))
    innovation_z = np.empty(shape)
    mean, cov = np.array(mean_c), np.array(cov_k2)
    means[0], variances[0] = mean, np.diag(cov)
    steady: SteadyGain | None = None  # the gain in use; ``cov`` is its covariance while it is
    steady_slope = np.full(shape[1], np.nan)  # the slope row it was solved for
    k = 0
    while k < shape[0]:
        stop = int(stretch_end[k])
        if (
            steady is not None
            and cov is steady.post_cov
            and stop > k
            and np.array_equal(slope[k], steady_slope)
        ):
            span = slice(k, stop)
            mean, means[k + 1 : stop + 1], innovation_z[span] = _steady_stretch(
                model, steady, mean, p0[span], ambient[span], reading[span]
            )
            variances[k + 1 : stop + 1] = np.diag(cov)
            k = stop
            continue
        # Each step's drive on its own (not one product over the run): the same sample then
        # gives the same bits however a trace is split into runs.
        drive = model.loss_input_k_per_w @ p0[k] + model.ambient_input * ambient[k]
        predicted = _predict(model, mean, cov, slope[k], drive)
        next_mean, next_cov, innovation_z[k] = _update(model, *predicted, reading[k])
        if stop - k >= MIN_STEADY_STEPS:
            tol = STEADY_RTOL * np.max(np.diag(cov), initial=0.0)
            if np.max(np.abs(next_cov - cov)) <= 2.0 * tol:
                found = _steady(*filt.steady_key, tuple(slope[k].tolist()))
                if found is not None and np.max(np.abs(cov - found.post_cov)) <= tol:
                    steady, steady_slope, cov = found, slope[k], found.post_cov  # fast now
                    continue
        mean, cov = next_mean, next_cov
        means[k + 1], variances[k + 1] = mean, np.diag(cov)
        k += 1
    junction_var = variances[:, model.junction_state]
    try:
        final = EstimatorState(mean, cov)
    except ValueError as err:
        # Still in float64 range, but a mode growing by e^hundreds has left the covariance
        # asymmetric or negative in rounding: the same runaway as leaving the range.
        raise ThermalRunaway(
            "the estimate lost its covariance: the loss feedback grows without bound",
            np.array(True),
        ) from err
    return KalmanTrace(final, means, np.sqrt(np.maximum(junction_var, 0.0)), innovation_z)


def _stretch_ends(slope: FloatArray, complete: npt.NDArray[np.bool_]) -> IntArray:
    """For each step k, the end (exclusive) of the stretch of steps from k with every reading
    present and the slope row of step k; k itself where step k lacks a reading."""
    n = complete.size
    joined = complete[1:] & complete[:-1] & np.all(slope[1:] == slope[:-1], axis=1)
    breaks = np.concatenate([np.flatnonzero(~joined) + 1, [n]])
    ends = breaks[np.searchsorted(breaks, np.arange(n), side="right")]
    return np.where(complete, ends, np.arange(n))


def _tuple(value: npt.ArrayLike, n_phases: int) -> tuple[float, ...]:
    return tuple(np.broadcast_to(np.asarray(value, dtype=np.float64), (n_phases,)).tolist())


def _steady_stretch(
    model: DiscreteModel,
    steady: SteadyGain,
    mean: FloatArray,
    p0_w: FloatArray,
    ambient_c: FloatArray,
    reading_c: FloatArray,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """m steps with the steady gain from the posterior ``mean``: (last mean, (m, n_states)
    posterior means, (m, n_phases) normalised innovations). p0_w, reading_c: (m, n_phases),
    every reading present; ambient_c: (m,). The slope is the one ``steady`` was solved for.
    """
    drive = p0_w @ model.loss_input_k_per_w.T + ambient_c[:, None] * model.ambient_input
    sensed = reading_c - model.sensor_offset_k
    posterior = linear_recurrence(
        steady.closed_loop, mean, drive @ steady.keep.T + sensed @ steady.gain.T
    )
    if not np.all(np.isfinite(posterior)):
        raise ThermalRunaway(
            "the estimate left float64 range: the loss feedback grows without bound",
            np.array(True),
        )
    prior = np.vstack([mean, posterior[:-1]]) @ steady.transition.T + drive
    innovation_z = (sensed - prior[:, model.sensor_state]) / steady.innovation_std
    return posterior[-1], posterior, innovation_z
