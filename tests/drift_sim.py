"""Invented cooling scenarios for the drift tests and bench/drift_false_alarms.py.

A rail of identical phases (the thermal chain of tests/factories.SMALL_RAIL: Foster stages
2 K/W, 0.5 s and 6 K/W, 20 s; board 1 K/W to ambient, 200 J/K) sampled at a fixed step. The
"true" temperatures follow the coupled network with a phase's junction-to-board resistances
scaled by a factor that may change every ``chunk`` steps, driven by the nominal loss plus a
random loss held over each step (the unmodelled loss the filter's process noise stands for);
the sensors read the junctions with Gaussian noise. Within a chunk the network is linear and
time-invariant, so it is propagated mode by mode with scipy.signal.lfilter (vectorised, no
Python loop per step); the step matrices come from the estimator's zero-order-hold
discretisation (checked against scipy.signal.cont2discrete in tests/reference).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import signal

from phaseward.physics.drift import (
    DriftCarry,
    DriftRun,
    drift_watch,
    steady_innovation,
)
from phaseward.physics.estimator import (
    EstimatorState,
    discrete_model,
    initial_from_readings,
    kalman_run,
)
from phaseward.physics.thermal import (
    CauerStages,
    FosterStages,
    ThermalNetwork,
    build_coupled_network,
    foster_to_cauer,
    steady_state_c,
)

F64 = npt.NDArray[np.float64]
CHAIN = foster_to_cauer(FosterStages(np.array([2.0, 6.0]), np.array([0.5, 20.0])))
BOARD_K_PER_W, BOARD_J_PER_K = 1.0, 200.0
PROCESS_NOISE_W, SENSOR_NOISE_K = 0.2, 0.5  # the definition's defaults


def network(n_phases: int, scale: F64 | None = None) -> ThermalNetwork:
    """The rail's network; ``scale`` (n_phases + 1,) multiplies each phase's chain
    resistances and, last, the board's resistance to ambient (heat capacities stay)."""
    factor = np.ones(n_phases + 1) if scale is None else scale
    chains = [CauerStages(CHAIN.r_k_per_w * f, CHAIN.c_j_per_k) for f in factor[:-1]]
    return build_coupled_network(
        chains,
        board_to_ambient_k_per_w=BOARD_K_PER_W * float(factor[-1]),
        board_c_j_per_k=BOARD_J_PER_K,
    )


def simulate(
    power_w: F64,
    dt_s: float,
    ambient_c: float,
    rng: np.random.Generator,
    *,
    scale: Callable[[int], F64] | None = None,
    chunk: int = 600,
) -> tuple[F64, F64]:
    """True junction temperatures and sensor readings, each (n, n_phases), reading k taken at
    the end of step k. power_w (n, n_phases) held over each step; ``scale(start_step)``: the
    resistance factors (n_phases + 1,) of the chunk starting there (None: nominal)."""
    n, n_ph = power_w.shape
    nominal = network(n_ph)
    x = steady_state_c(nominal, power_w[0], np.zeros(n_ph), ambient_c)
    junction = np.empty((n, n_ph))
    noise = PROCESS_NOISE_W * rng.standard_normal((n, n_ph))
    for lo in range(0, n, chunk):  # one turn per chunk of steps
        hi = min(n, lo + chunk)
        net = nominal if scale is None else network(n_ph, scale(lo))
        m = discrete_model(net, dt_s, process_noise_w=0.0, sensor_noise_k=1.0)
        # An RC network's transition is similar to a symmetric matrix: with D = diag(sqrt(C)),
        # D F D^-1 = expm(-D^-1 G D^-1 dt). Its eigh modes are orthonormal even where identical
        # phases repeat an eigenvalue, where eig's eigenvectors can come out singular (it did
        # on one LAPACK build of the same numpy).
        root_c = np.sqrt(net.capacitance_j_per_k)
        lam, q = np.linalg.eigh(root_c[:, None] * m.transition / root_c[None, :])
        drive = (power_w[lo:hi] + noise[lo:hi]) @ m.loss_input_k_per_w.T
        drive += ambient_c * m.ambient_input
        modal_in = q.T @ (root_c[:, None] * drive.T)  # (n_states, steps)
        y0 = q.T @ (root_c * x)
        modes = np.empty_like(modal_in)
        for j in range(lam.size):  # y_{k+1} = lam y_k + u_k, from y0
            modes[j], _ = signal.lfilter([1.0], [1.0, -lam[j]], modal_in[j], zi=[lam[j] * y0[j]])
        states = (q @ modes) / root_c[:, None]
        junction[lo:hi] = states[net.junction_node].T
        x = states[:, -1]
    readings = junction + SENSOR_NOISE_K * rng.standard_normal((n, n_ph))
    return junction, readings


@dataclass(frozen=True)
class Watched:
    """The filter's normalised innovations and the drift test over one simulated run."""

    z: F64
    run: DriftRun
    junction_est_c: F64


def watch(
    power_w: F64,
    readings: F64,
    dt_s: float,
    ambient_c: float,
    *,
    reference: float,
    threshold: float,
    pieces: int = 1,
) -> Watched:
    """Filter the readings on the nominal model and run the drift test, in ``pieces`` calls
    that carry the estimate and the test (as the monitor does batch by batch)."""
    n, n_ph = power_w.shape
    net = network(n_ph)
    noise = {"process_noise_w": PROCESS_NOISE_W, "sensor_noise_k": SENSOR_NOISE_K}
    scale = steady_innovation(discrete_model(net, dt_s, **noise)).scale
    slope = np.zeros(n_ph)
    state: EstimatorState = initial_from_readings(
        net, ambient_c, steady_state_c(net, power_w[0], slope, ambient_c), readings[0],
        sensor_noise_k=SENSOR_NOISE_K,
    )  # fmt: skip
    carry = DriftCarry.fresh(n_ph + 1)
    zs, runs, junctions = [], [], []
    t_s = dt_s * np.arange(1, n + 1)
    for part in np.array_split(np.arange(n), pieces):
        lo, hi = int(part[0]), int(part[-1]) + 1
        trace = kalman_run(
            net, state, dt_s, power_w[lo:hi], np.zeros((hi - lo, n_ph)), ambient_c,
            readings[lo:hi], **noise,
        )  # fmt: skip
        state = trace.final
        run = drift_watch(
            trace.innovation_z, scale, power_w[lo:hi], t_s[lo:hi], carry,
            reference=reference, threshold=threshold,
        )  # fmt: skip
        carry = run.carry
        zs.append(trace.innovation_z)
        runs.append((run, lo))
        junctions.append(trace.means_c[1:, net.junction_node])
    joined = DriftRun(
        statistic=np.concatenate([r.statistic for r, _ in runs]),
        raised=np.concatenate([r.raised for r, _ in runs]),
        window=np.concatenate([r.window for r, _ in runs], axis=1),
        start_t_s=np.concatenate([r.start_t_s for r, _ in runs]),
        recent=np.concatenate([r.recent for r, _ in runs], axis=1),
        changes=[(k + lo, c, on) for r, lo in runs for k, c, on in r.changes],
        carry=carry,
    )
    return Watched(np.concatenate(zs), joined, np.concatenate(junctions))
