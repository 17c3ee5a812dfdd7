"""Thermal networks: Foster and Cauer stages, the coupled phase/board network, exact solutions.

Terms follow the JEDEC JESD51 series: ``Zth(t)`` is the junction temperature rise per watt
after a power step at t = 0 from thermal equilibrium (K/W); a Foster model writes it as
``sum_i R_i (1 - exp(-t / tau_i))``, a Cauer model is the physical ladder (node capacitance
to the thermal reference, resistances in series, the last one to the reference). Only the
Cauer form may be chained, so per-phase Foster fits are converted before coupling.

Network model
-------------
Each node n has heat capacity C_n (J/K). Nodes exchange heat through the node-to-node
conductance matrix G (W/K: symmetric, zero row sums, off-diagonal entries <= 0) and lose it
to ambient through g_amb (W/K). Phase k injects its loss at its junction node; losses are
affine in junction temperature, P_k = p0_k + s_k T_j,k (see :mod:`losses`), so

    C dT/dt = -(G + diag(g_amb) - E diag(s) E^T) T + E p0 + g_amb T_amb = -A T + f

is linear (E places phase values at junction nodes). With D = diag(C)^-1/2 the matrix
M = D A D is symmetric, M = V diag(lam) V^T, and with Phi = D V the exact solution for
constant p0 and s is

    T(t) = Phi [exp(-lam t) z0 + t exprel(-lam t) u],   z0 = Phi^T C T(0),   u = Phi^T f,

exprel(x) = (e^x - 1) / x. A steady state exists iff A is positive definite (all lam > 0);
otherwise the conduction-loss feedback outgrows the conductance to ambient (thermal runaway).
:func:`_modes` is the one eigen-decomposition behind Cauer Zth, :func:`simulate_c` and
:func:`time_to_limit_batch_s`; :func:`_system_matrix` and :func:`_injection` build A and f for
every solver. Steady states are stacked ``np.linalg.solve`` calls; positive definiteness is
read from the same solve by the M-matrix criterion (:func:`_solve_stable`).

Failure policy: invalid arguments raise ValueError naming the argument; a missing steady
state or a diverging temperature feedback raises :class:`ThermalRunaway` (or is flagged).
"""

import operator
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from itertools import pairwise
from typing import Literal, overload

import numpy as np
import numpy.typing as npt
from scipy import linalg, signal, special

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]
IntArray = npt.NDArray[np.intp]

_SETTLED = 40.0  # time constants after which exp(-t/tau) < 5e-18: the state has settled
_UNDERFLOW = 600.0  # exp(-600) = 3e-261: a mode this far decayed has settled
_GROWTH = 700.0  # largest exponent of a growing mode that float64 still holds (e^709 max)
_GRID_PER_DECADE = 64  # log-grid density used to bracket the first limit crossing
_PEAK_PER_DECADE = 8  # log-grid density that locates a peak before the zoom refines it
_ZOOM_POINTS = 33  # points per zoom round of a peak: the bracket shrinks 16-fold per round
_ZOOM_ROUNDS = 4  # 16^-4 = 1.5e-5 of the two grid intervals around the best grid point
_GRID_MAX = 2048  # grid points at most (only a near-singular system spans > 32 decades)
_WINDOW_STEPS = 8192  # transient steps per Picard window (working set stays in cache)
_ONE = np.ones(1)  # numerator of the per-mode filter (the input gain is folded in before)


class ThermalRunaway(ArithmeticError):
    """No stable steady state, or a temperature feedback that does not settle.

    ``mask`` is a boolean array over the batch shape of the call (shape () for one case)
    that marks the runaway cases; ``cases`` lists their indices.
    """

    def __init__(self, message: str, mask: BoolArray) -> None:
        super().__init__(message)
        self.mask = mask

    @property
    def cases(self) -> IntArray:
        """Indices of the runaway cases, (n_runaway, batch ndim)."""
        return np.argwhere(self.mask)


def _finite(
    name: str, value: npt.ArrayLike, *, positive: bool = False, nonnegative: bool = False
) -> FloatArray:
    """``value`` as a read-only float64 copy; ValueError naming ``name`` unless finite etc."""
    arr = np.array(value, dtype=np.float64)
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite")
    if positive and not np.all(arr > 0.0):
        raise ValueError(f"{name} must be > 0")
    if nonnegative and not np.all(arr >= 0.0):
        raise ValueError(f"{name} must be >= 0")
    arr.setflags(write=False)
    return arr


def _conductance_matrix(n_nodes: int, i: IntArray, j: IntArray, g: FloatArray) -> FloatArray:
    """Node-to-node conductance matrix (n_nodes, n_nodes) of edges i-j with conductance g."""
    out = np.zeros((n_nodes, n_nodes))
    np.add.at(out, (i, i), g)
    np.add.at(out, (j, j), g)
    np.add.at(out, (i, j), -g)
    np.add.at(out, (j, i), -g)
    return out


def _modes(a_w_per_k: FloatArray, c_j_per_k: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Decay rates lam (..., n) in 1/s and mode shapes Phi = C^-1/2 V (..., n, n).

    ``a_w_per_k`` (..., n, n) symmetric, ``c_j_per_k`` (n,) > 0; lam ascending.
    """
    d = 1.0 / np.sqrt(c_j_per_k)
    lam, v = np.linalg.eigh(d[:, None] * a_w_per_k * d[None, :])
    return lam, d[:, None] * v


def _chain_matrix(r_k_per_w: FloatArray) -> FloatArray:
    """System matrix (n, n) of a lone Cauer chain whose last resistance goes to the reference."""
    n = r_k_per_w.size
    idx = np.arange(n - 1)
    a = _conductance_matrix(n, idx, idx + 1, 1.0 / r_k_per_w[:-1])
    a[-1, -1] += 1.0 / r_k_per_w[-1]
    return a


@dataclass(frozen=True, eq=False)
class FosterStages:
    """Foster model, Zth(t) = sum_i R_i (1 - exp(-t / tau_i)).

    ``r_k_per_w`` (n_stages,) > 0 in K/W, ``tau_s`` (n_stages,) > 0 in s.

    >>> f = FosterStages(np.array([0.5, 1.5]), np.array([0.01, 1.0]))
    >>> print(f"{f.zth_k_per_w(1.0):.4f}")
    1.4482
    >>> np.round(f.zth_k_per_w([0.0, 100.0]), 4)
    array([0., 2.])
    """

    r_k_per_w: FloatArray
    tau_s: FloatArray

    def __post_init__(self) -> None:
        r = _finite("r_k_per_w", self.r_k_per_w, positive=True)
        tau = _finite("tau_s", self.tau_s, positive=True)
        if r.ndim != 1 or r.size == 0:
            raise ValueError("r_k_per_w must have shape (n_stages,) with n_stages >= 1")
        if tau.shape != r.shape:
            raise ValueError("tau_s must have the shape of r_k_per_w")
        object.__setattr__(self, "r_k_per_w", r)
        object.__setattr__(self, "tau_s", tau)

    def zth_k_per_w(self, t_s: npt.ArrayLike) -> FloatArray:
        """Zth at times ``t_s`` >= 0 (any shape), K/W, same shape as ``t_s``."""
        t = _finite("t_s", t_s, nonnegative=True)
        return np.asarray(np.sum(self.r_k_per_w * -np.expm1(-t[..., None] / self.tau_s), axis=-1))


@dataclass(frozen=True, eq=False)
class CauerStages:
    """Cauer ladder: C_1 at the junction, R_1 to node 2 (C_2), ..., R_n to the reference.

    ``r_k_per_w`` (n_stages,) > 0 in K/W, ``c_j_per_k`` (n_stages,) > 0 in J/K.

    >>> c = CauerStages(np.array([1.0]), np.array([2.0]))
    >>> print(f"{c.zth_k_per_w(2.0):.4f}")  # 1 - exp(-1)
    0.6321
    """

    r_k_per_w: FloatArray
    c_j_per_k: FloatArray

    def __post_init__(self) -> None:
        r = _finite("r_k_per_w", self.r_k_per_w, positive=True)
        c = _finite("c_j_per_k", self.c_j_per_k, positive=True)
        if r.ndim != 1 or r.size == 0:
            raise ValueError("r_k_per_w must have shape (n_stages,) with n_stages >= 1")
        if c.shape != r.shape:
            raise ValueError("c_j_per_k must have the shape of r_k_per_w")
        object.__setattr__(self, "r_k_per_w", r)
        object.__setattr__(self, "c_j_per_k", c)

    def zth_k_per_w(self, t_s: npt.ArrayLike) -> FloatArray:
        """Zth at times ``t_s`` >= 0 (any shape), K/W, exact from the ladder's eigen-modes."""
        return cauer_to_foster(self).zth_k_per_w(t_s)


def cauer_to_foster(cauer: CauerStages) -> FosterStages:
    """Foster model with the same Zth(t) as ``cauer`` (eigen-decomposition of the ladder).

    Mode k of the ladder contributes R_k = Phi_1k^2 / lam_k and tau_k = 1 / lam_k; stages
    are returned in ascending tau.

    >>> f = cauer_to_foster(CauerStages(np.array([1.0, 2.0]), np.array([0.1, 5.0])))
    >>> print(f"{f.r_k_per_w.sum():.6f}")  # steady state: the sum of the ladder resistances
    3.000000
    """
    lam, phi = _modes(_chain_matrix(cauer.r_k_per_w), cauer.c_j_per_k)
    return FosterStages(phi[0, ::-1] ** 2 / lam[::-1], 1.0 / lam[::-1])


def foster_to_cauer(foster: FosterStages) -> CauerStages:
    """Cauer ladder with the same Zth(t) as ``foster`` (needs distinct time constants).

    The ladder's scaled system matrix is a Jacobi (tridiagonal) matrix whose eigenvalues are
    1/tau_i and whose eigenvectors have first components w_i = sqrt(C_1 R_i / tau_i); that
    inverse eigenvalue problem is solved by Householder tridiagonalisation of diag(1/tau)
    seen from the start vector w (``scipy.linalg.hessenberg``), which is backward stable,
    instead of the ill-conditioned polynomial continued fraction. Invariants: the initial
    slope gives C_1 = 1 / sum(R_i / tau_i), the steady state gives sum of Cauer R = sum of
    Foster R. Intended for 1 to about 6 stages; ArithmeticError if rounding leaves no
    positive ladder (time constants too close together).

    >>> c = foster_to_cauer(FosterStages(np.array([0.5, 1.5]), np.array([0.01, 1.0])))
    >>> np.round(c.r_k_per_w, 4), np.round(c.c_j_per_k, 4)
    (array([0.5303, 1.4697]), array([0.0194, 0.6608]))
    """
    tau = np.sort(foster.tau_s)
    if np.any(tau[1:] <= tau[:-1] * (1.0 + 1e-9)):
        raise ValueError("tau_s must be distinct to convert a Foster model to Cauer form")
    lam = 1.0 / foster.tau_s
    weight = foster.r_k_per_w * lam
    c_first = 1.0 / weight.sum()
    start = np.sqrt(weight * c_first)
    # Householder reflector H with H e1 = -start (no cancellation since start > 0).
    v = start.copy()
    v[0] += 1.0
    h = np.eye(lam.size) - np.outer(v, v) / (1.0 + start[0])
    jacobi = linalg.hessenberg(h @ np.diag(lam) @ h)
    diag = np.diag(jacobi)
    off_sq = np.diag(jacobi, -1) ** 2
    # Row i of the Jacobi matrix: J_ii C_i = g_{i-1} + g_i, J_{i,i+1}^2 = g_i^2 / (C_i C_{i+1}).
    g = np.empty(lam.size)
    c = np.empty(lam.size)
    c[0], g_prev = c_first, 0.0
    for i in range(lam.size):
        g[i] = diag[i] * c[i] - g_prev
        if not g[i] > 0.0:
            raise ArithmeticError("no positive Cauer ladder: Foster time constants too close")
        if i + 1 < lam.size:
            c[i + 1] = g[i] ** 2 / (c[i] * off_sq[i])
        g_prev = g[i]
    return CauerStages(1.0 / g, c)


@dataclass(frozen=True, eq=False)
class ThermalNetwork:
    """Linear thermal network of phases coupled through nodes (see the module docstring).

    conductance_w_per_k: (n_nodes, n_nodes) node-to-node G, symmetric, zero row sums,
        off-diagonal <= 0 (positive semi-definite).
    capacitance_j_per_k: (n_nodes,) > 0.
    ambient_conductance_w_per_k: (n_nodes,) >= 0; every node needs a path to ambient.
    junction_node: (n_phases,) distinct node indices where phase losses enter.
    board_node: index of the shared board node.

    >>> one = ThermalNetwork(np.zeros((1, 1)), np.array([3.0]), np.array([0.5]), np.array([0]), 0)
    >>> one.n_nodes, one.n_phases  # a single lumped node: R = 2 K/W, C = 3 J/K, tau = 6 s
    (1, 1)
    """

    conductance_w_per_k: FloatArray
    capacitance_j_per_k: FloatArray
    ambient_conductance_w_per_k: FloatArray
    junction_node: IntArray
    board_node: int

    def __post_init__(self) -> None:
        g = _finite("conductance_w_per_k", self.conductance_w_per_k)
        c = _finite("capacitance_j_per_k", self.capacitance_j_per_k, positive=True)
        g_amb = _finite(
            "ambient_conductance_w_per_k", self.ambient_conductance_w_per_k, nonnegative=True
        )
        n = c.size
        if c.ndim != 1 or n == 0:
            raise ValueError("capacitance_j_per_k must have shape (n_nodes,) with n_nodes >= 1")
        scale = float(np.abs(g).max(initial=0.0) + g_amb.max())
        if g.shape != (n, n) or not np.allclose(g, g.T, rtol=0.0, atol=1e-12 * scale):
            raise ValueError("conductance_w_per_k must be a symmetric (n_nodes, n_nodes) matrix")
        if np.any(g[~np.eye(n, dtype=bool)] > 0.0) or np.any(np.abs(g.sum(axis=1)) > 1e-9 * scale):
            raise ValueError(
                "conductance_w_per_k must be node-to-node: off-diagonal <= 0, zero row sums"
            )
        if g_amb.shape != (n,):
            raise ValueError("ambient_conductance_w_per_k must have shape (n_nodes,)")
        junction = np.array(self.junction_node)
        if (
            junction.ndim != 1
            or junction.dtype.kind not in "iu"
            or np.unique(junction).size != junction.size
            or np.any((junction < 0) | (junction >= n))
        ):
            raise ValueError(f"junction_node must hold distinct node indices in 0..{n - 1}")
        try:
            board = operator.index(self.board_node)
        except TypeError:
            board = -1
        if not 0 <= board < n:
            raise ValueError(f"board_node must be a node index in 0..{n - 1}")
        junction = junction.astype(np.intp)
        junction.setflags(write=False)
        for name, arr in (
            ("conductance_w_per_k", g),
            ("capacitance_j_per_k", c),
            ("ambient_conductance_w_per_k", g_amb),
            ("junction_node", junction),
        ):
            object.__setattr__(self, name, arr)
        object.__setattr__(self, "board_node", board)
        if not _solve_stable(g + np.diag(g_amb), np.zeros(n))[1]:
            raise ValueError("every node needs a conductive path to ambient")

    @property
    def n_nodes(self) -> int:
        """Number of nodes."""
        return int(self.capacitance_j_per_k.size)

    @property
    def n_phases(self) -> int:
        """Number of phases (junction nodes)."""
        return int(self.junction_node.size)


def build_coupled_network(
    phase_chains: Sequence[CauerStages],
    *,
    board_to_ambient_k_per_w: float,
    board_c_j_per_k: float,
) -> ThermalNetwork:
    """Phases as Cauer chains junction -> ... -> shared board node -> ambient.

    Each chain describes one phase from its junction to the board (its last resistance ends
    on the board node); chains may have different lengths. Nodes are numbered phase by phase,
    junction first, and the board node comes last.

    >>> chain = CauerStages(np.array([2.0, 3.0]), np.array([0.1, 1.0]))
    >>> net = build_coupled_network([chain, chain], board_to_ambient_k_per_w=1.0,
    ...                             board_c_j_per_k=50.0)
    >>> net.n_nodes, net.junction_node.tolist(), net.board_node
    (5, [0, 2], 4)
    """
    if len(phase_chains) == 0:
        raise ValueError("phase_chains must hold at least one chain")
    r_board = _finite("board_to_ambient_k_per_w", board_to_ambient_k_per_w, positive=True)
    c_board = _finite("board_c_j_per_k", board_c_j_per_k, positive=True)
    sizes = np.array([chain.r_k_per_w.size for chain in phase_chains])
    starts = np.concatenate([[0], np.cumsum(sizes)])
    board = int(starts[-1])
    upper = [np.append(np.arange(s + 1, e), board) for s, e in pairwise(starts)]
    lower = np.arange(board)
    r = np.concatenate([chain.r_k_per_w for chain in phase_chains])
    g_amb = np.zeros(board + 1)
    g_amb[board] = 1.0 / r_board
    return ThermalNetwork(
        conductance_w_per_k=_conductance_matrix(board + 1, lower, np.concatenate(upper), 1.0 / r),
        capacitance_j_per_k=np.append(
            np.concatenate([ch.c_j_per_k for ch in phase_chains]), c_board
        ),
        ambient_conductance_w_per_k=g_amb,
        junction_node=starts[:-1].astype(np.intp),
        board_node=board,
    )


def _phase_values(net: ThermalNetwork, name: str, value: npt.ArrayLike) -> FloatArray:
    arr = _finite(name, value)
    if arr.ndim == 0 or arr.shape[-1] != net.n_phases:
        raise ValueError(f"{name} must have shape (..., n_phases) with n_phases={net.n_phases}")
    return arr


def _system_matrix(net: ThermalNetwork, slope_w_per_k: FloatArray) -> FloatArray:
    """A = G + diag(g_amb) - E diag(s) E^T, shape slope.shape[:-1] + (n_nodes, n_nodes)."""
    a0 = net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)
    a = np.array(np.broadcast_to(a0, (*slope_w_per_k.shape[:-1], *a0.shape)))
    a[..., net.junction_node, net.junction_node] -= slope_w_per_k
    return a


def _injection(net: ThermalNetwork, p0_w: FloatArray, ambient_c: FloatArray) -> FloatArray:
    """f = E p0 + g_amb T_amb in W, shape broadcast(p0.shape[:-1], ambient.shape) + (n_nodes,)."""
    f = ambient_c[..., None] * net.ambient_conductance_w_per_k
    f = np.array(
        np.broadcast_to(f, (*np.broadcast_shapes(f.shape[:-1], p0_w.shape[:-1]), f.shape[-1]))
    )
    f[..., net.junction_node] += p0_w
    return f


# A steady state that would keep fewer than 4 of float64's ~16 digits is taken as no steady
# state: exactly singular networks land near 1e16-1e17 after rounding (common practice for a
# numerical rank test, e.g. numpy.linalg.matrix_rank's tolerance of eps times the size).
MAX_CONDITION = 1e12


def _solve_stable(
    a: FloatArray, rhs: FloatArray
) -> tuple[FloatArray, BoolArray, FloatArray, FloatArray]:
    """Solve A x = rhs for a stack of symmetric Z-matrices, flagging those not positive definite.

    A symmetric matrix with non-positive off-diagonal entries is positive definite iff it is
    a non-singular M-matrix, iff A^-1 >= 0 elementwise (Berman and Plemmons, Nonnegative
    Matrices in the Mathematical Sciences, ch. 6). So a probe solve A y = 1 gives y > 0
    exactly for the stable cases: one LU per case instead of an eigen-decomposition.
    For such a matrix max(y) is also ||A^-1||_inf, so ||A||_inf max(y) is its condition
    number: a matrix singular but for rounding (no path to ambient) gives y > 0 too, of order
    1/eps, and is told apart by a condition number past ``MAX_CONDITION``.
    Returns x (NaN where unstable), the stable mask and the condition number (batch shape),
    and the probe y.
    """
    both = np.stack(np.broadcast_arrays(rhs, np.ones_like(rhs)), axis=-1)
    try:
        sol = np.linalg.solve(a, both)
    except np.linalg.LinAlgError:  # an exactly singular case somewhere in the stack
        batch = np.broadcast_shapes(a.shape[:-2], both.shape[:-2])
        a_flat = np.broadcast_to(a, (*batch, *a.shape[-2:])).reshape(-1, *a.shape[-2:])
        b_flat = np.broadcast_to(both, (*batch, *both.shape[-2:])).reshape(-1, *both.shape[-2:])
        regular = np.linalg.eigvalsh(a_flat)[:, 0] > 0.0
        sol = np.full(b_flat.shape, np.nan)
        sol[regular] = np.linalg.solve(a_flat[regular], b_flat[regular])
        sol = sol.reshape(*batch, *both.shape[-2:])
    probe = sol[..., 1]
    condition = np.abs(a).sum(axis=-1).max(axis=-1) * probe.max(axis=-1)
    stable = (
        np.all(probe > 0.0, axis=-1)
        & (condition < MAX_CONDITION)
        & np.all(np.isfinite(sol[..., 0]), axis=-1)
    )
    return np.where(stable[..., None], sol[..., 0], np.nan), stable, condition, probe


@overload
def steady_state_c(
    net: ThermalNetwork,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: npt.ArrayLike,
    *,
    runaway: Literal["raise"] = ...,
) -> FloatArray: ...


@overload
def steady_state_c(
    net: ThermalNetwork,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: npt.ArrayLike,
    *,
    runaway: Literal["flag"],
) -> tuple[FloatArray, BoolArray]: ...


def steady_state_c(
    net: ThermalNetwork,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: npt.ArrayLike,
    *,
    runaway: Literal["raise", "flag"] = "raise",
) -> FloatArray | tuple[FloatArray, BoolArray]:
    """Steady-state node temperatures (..., n_nodes) in degC for losses P = p0 + s T_j.

    Solves (G + diag(g_amb) - E diag(s) E^T) T = g_amb T_amb + E p0 per case.
    ``p0_w``, ``slope_w_per_k``: (..., n_phases) in W and W/K, broadcast together;
    ``ambient_c`` broadcasts against the batch shape. With ``runaway="raise"`` a case without
    a stable steady state raises :class:`ThermalRunaway`; with ``"flag"`` the result is
    ``(temps, runaway_mask)`` with NaN rows for those cases.

    >>> chain = CauerStages(np.array([2.0]), np.array([0.1]))
    >>> net = build_coupled_network([chain], board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> np.round(steady_state_c(net, [1.0], [0.0], 25.0), 3)  # 1 W through 2 + 1 K/W
    array([28., 26.])
    >>> temps, bad = steady_state_c(net, [[1.0], [1.0]], [[0.1], [0.5]], 25.0, runaway="flag")
    >>> bad.tolist(), np.round(temps[0], 3).tolist()
    ([False, True], [40.0, 30.0])
    """
    p0 = _phase_values(net, "p0_w", p0_w)
    slope = _phase_values(net, "slope_w_per_k", slope_w_per_k)
    p0, slope = np.broadcast_arrays(p0, slope)
    temps, stable, _, _ = _solve_stable(
        _system_matrix(net, slope), _injection(net, p0, _finite("ambient_c", ambient_c))
    )
    if runaway == "flag":
        return temps, ~stable
    if runaway != "raise":
        raise ValueError('runaway must be "raise" or "flag"')
    if not np.all(stable):
        raise ThermalRunaway(
            "no stable steady state: conduction-loss feedback exceeds the network's "
            f"conductance to ambient in case(s) {np.argwhere(~stable).tolist()}",
            ~stable,
        )
    return temps


def _zoh_window(
    decay: FloatArray,
    power_in: FloatArray,
    ambient_in: FloatArray,
    phi_j: FloatArray,
    z0: FloatArray,
    p0_t: FloatArray,
    slope_t: FloatArray,
    *,
    tol_k: float,
    max_iter: int,
) -> FloatArray:
    """Modal states z_1..z_n (n_modes, n) of one window of the zero-order-hold recursion.

    z_{k+1} = decay z_k + power_in (p0_k + s_k T_j,k) + ambient_in_k with T_j,k = phi_j z_k,
    solved by Picard iteration on the junction temperatures. Each sweep is one first-order
    IIR filter per mode over the window (``scipy.signal.lfilter`` takes one coefficient set
    per call, so the loop is over modes, never over samples). p0_t, slope_t: (n_phases, n).
    """
    tj_start = phi_j @ z0
    tj = np.repeat(tj_start[:, None], p0_t.shape[1], axis=1)
    history: list[float] = []
    for _ in range(max_iter):
        u = power_in @ (p0_t + slope_t * tj) + ambient_in
        z = np.empty_like(u)
        for k in range(decay.size):
            z[k], _ = signal.lfilter(_ONE, (1.0, -decay[k]), u[k], zi=decay[k : k + 1] * z0[k])
        tj_new = np.empty_like(tj)
        tj_new[:, 0] = tj_start
        np.matmul(phi_j, z[:, :-1], out=tj_new[:, 1:])
        history.append(float(np.max(np.abs(tj_new - tj))))
        tj = tj_new
        if history[-1] < tol_k:
            return z
        if not np.isfinite(history[-1]) or (len(history) > 3 and history[-4] < history[-1]):
            break
    raise ThermalRunaway(
        f"junction temperatures did not settle ({len(history)} Picard sweeps, last change "
        f"{history[-1]:.3g} K): the conduction-loss feedback diverges over this trace",
        np.array(True),
    )


def simulate_c(
    net: ThermalNetwork,
    initial_c: npt.ArrayLike,
    dt_s: float,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: npt.ArrayLike,
    *,
    tol_k: float = 1e-7,
    max_iter: int = 100,
) -> FloatArray:
    """Node temperatures (n_steps + 1, n_nodes) in degC over a trace of constant step ``dt_s``.

    Over step k the loss is held at P_k = p0_k + s_k T_j(t_k) (zero-order hold: losses are
    re-evaluated at the temperature reached at the start of each step) and the network is
    propagated exactly over the step (matrix exponential in modal form, decomposed once).
    Given the power sequence the recursion is linear time-invariant per mode, so a whole
    window of steps is one filter call per mode; the temperature feedback is resolved by
    Picard iteration over the window until the junction temperatures change by less than
    ``tol_k``. Windows of 8192 steps keep the working set in cache and each starts from the
    converged end state of the one before. :class:`ThermalRunaway` if the iteration diverges
    or has not settled after ``max_iter`` sweeps. Only a constant step is supported (a
    per-step dt would make the filters time-varying, i.e. a loop over samples).

    initial_c: (n_nodes,); p0_w, slope_w_per_k: (n_steps, n_phases) in W and W/K;
    ambient_c: float or (n_steps,) degC held over each step.

    >>> chain = CauerStages(np.array([2.0]), np.array([0.5]))
    >>> net = build_coupled_network([chain], board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> temps = simulate_c(net, [25.0, 25.0], 1.0, np.full((600, 1), 2.0), np.zeros((600, 1)), 25.0)
    >>> temps.shape, np.round(temps[-1], 3).tolist()  # settles at 25 + 2 W x (2 + 1) K/W
    ((601, 2), [31.0, 27.0])
    """
    dt = float(_finite("dt_s", dt_s, positive=True))
    temp0 = _finite("initial_c", initial_c)
    if temp0.shape != (net.n_nodes,):
        raise ValueError(f"initial_c must have shape (n_nodes,) = ({net.n_nodes},)")
    p0 = _phase_values(net, "p0_w", p0_w)
    slope = _phase_values(net, "slope_w_per_k", slope_w_per_k)
    if p0.ndim != 2 or slope.shape != p0.shape or p0.shape[0] == 0:
        raise ValueError("p0_w and slope_w_per_k must both have shape (n_steps, n_phases)")
    n_steps = p0.shape[0]
    ambient = _finite("ambient_c", ambient_c)
    if ambient.shape not in ((), (n_steps,)):
        raise ValueError("ambient_c must be a float or have shape (n_steps,)")
    if max_iter < 1 or not tol_k > 0.0:
        raise ValueError("max_iter must be >= 1 and tol_k > 0")
    lam, phi = _modes(_system_matrix(net, np.zeros(net.n_phases)), net.capacitance_j_per_k)
    decay = np.exp(-lam * dt)
    gain = dt * special.exprel(-lam * dt)  # (1 - decay) / lam without cancellation
    phi_j = phi[net.junction_node]
    power_in = phi_j.T * gain[:, None]
    ambient_in = np.outer(gain * (phi.T @ net.ambient_conductance_w_per_k), ambient.reshape(-1))
    p0_t, slope_t = np.ascontiguousarray(p0.T), np.ascontiguousarray(slope.T)
    temps = np.empty((n_steps + 1, net.n_nodes))
    temps[0] = temp0
    z0 = phi.T @ (net.capacitance_j_per_k * temp0)
    for start in range(0, n_steps, _WINDOW_STEPS):
        window = slice(start, min(n_steps, start + _WINDOW_STEPS))
        z = _zoh_window(
            decay,
            power_in,
            ambient_in if ambient.ndim == 0 else ambient_in[:, window],
            phi_j,
            z0,
            p0_t[:, window],
            slope_t[:, window],
            tol_k=tol_k,
            max_iter=max_iter,
        )
        np.matmul(z.T, phi.T, out=temps[window.start + 1 : window.stop + 1])
        z0 = z[:, -1].copy()
    return temps


def bracketed_root(
    func: Callable[[FloatArray], FloatArray],
    lo: FloatArray,
    hi: FloatArray,
    *,
    rtol: float,
    atol: float = 0.0,
    max_iter: int = 400,
    f_lo: FloatArray | None = None,
    f_hi: FloatArray | None = None,
) -> tuple[FloatArray, FloatArray]:
    """Vectorised root bracketing: shrink [lo, hi] elementwise around a sign change.

    ``func`` maps x (n,) to f (n,) with f(lo) <= 0 < f(hi) (f may be +inf); elements are
    independent. Illinois-modified regula falsi with every fifth step a bisection, each
    point kept half a tolerance inside the bracket; stops when hi - lo <= atol + rtol |hi|.
    Returns the final (lo, hi) with f(lo) <= 0 < f(hi). ArithmeticError if ``max_iter`` is
    exhausted. ``f_lo``, ``f_hi``: f at lo and hi where the caller has them already.

    >>> lo, hi = bracketed_root(lambda x: x**2 - 2.0, np.array([0.0]), np.array([2.0]),
    ...                         rtol=1e-12)
    >>> print(f"{lo[0]:.10f} {hi[0]:.10f}")
    1.4142135624 1.4142135624
    """
    lo, hi = np.array(lo, dtype=np.float64), np.array(hi, dtype=np.float64)
    f_lo = func(lo) if f_lo is None else np.array(f_lo, dtype=np.float64)
    f_hi = func(hi) if f_hi is None else np.array(f_hi, dtype=np.float64)
    if np.any(f_lo > 0.0) or not np.all(f_hi > 0.0):
        raise ValueError("lo and hi must bracket a sign change: f(lo) <= 0 < f(hi)")
    kept = np.zeros(lo.shape, dtype=np.int8)  # side kept last step: -1 lo, +1 hi, 0 none
    for step in range(max_iter):
        tol = atol + rtol * np.abs(hi)
        open_ = hi - lo > tol
        if not np.any(open_):
            return lo, hi
        secant = np.isfinite(f_lo) & np.isfinite(f_hi) & (step % 5 != 4)
        with np.errstate(invalid="ignore", divide="ignore"):
            x = np.where(secant, lo - f_lo * (hi - lo) / (f_hi - f_lo), 0.5 * (lo + hi))
        x = np.where(open_, np.clip(x, lo + 0.5 * tol, hi - 0.5 * tol), lo)
        f = func(x)
        above = open_ & (f > 0.0)
        below = open_ & ~above
        # Illinois: halve the stale end's value when the same end is kept twice running.
        f_lo = np.where(above & (kept == -1), 0.5 * f_lo, f_lo)
        f_hi = np.where(below & (kept == 1), 0.5 * f_hi, f_hi)
        hi, f_hi = np.where(above, x, hi), np.where(above, f, f_hi)
        lo, f_lo = np.where(below, x, lo), np.where(below, f, f_lo)
        kept = np.where(above, -1, np.where(below, 1, kept)).astype(np.int8)
    raise ArithmeticError(f"root bracketing did not converge in {max_iter} steps")


@dataclass(frozen=True, eq=False)
class LimitCrossing:
    """First time a junction reaches its limit, for one case.

    time_s: seconds from now (np.inf if never, or not within the horizon); phase: the phase
    that gets there first (-1 if none); runaway: the loss feedback has no stable steady
    state, so temperatures grow without bound (the crossing time is then still finite).
    """

    time_s: float
    phase: int
    runaway: bool


@dataclass(frozen=True, eq=False)
class LimitCrossings:
    """:class:`LimitCrossing` fields as arrays of shape (n_cases,)."""

    time_s: FloatArray
    phase: IntArray
    runaway: BoolArray


@dataclass(frozen=True, eq=False)
class _Cases:
    """The exact solution of n_cases systems with constant inputs (see the module docstring).

    lam (b, n) decay rates, phi (b, n, n) mode shapes, z0 and u (b, n) the modal initial
    state and injection; ``junction`` indexes the junction rows of phi.
    """

    lam: FloatArray
    phi: FloatArray
    z0: FloatArray
    u: FloatArray
    junction: IntArray

    def at_c(self, rows: IntArray, t: FloatArray, *, nodes: bool = False) -> FloatArray:
        """Junction (or, with ``nodes``, all node) temperatures (len(rows), n_t, k) in degC
        at times t (len(rows), n_t) >= 0; a growing mode past float range gives inf."""
        return self.combine(rows, *_time_basis(self.lam[rows], t), nodes=nodes)

    def combine(
        self, rows: IntArray, decay: FloatArray, gain: FloatArray, *, nodes: bool = False
    ) -> FloatArray:
        """:meth:`at_c` from the time basis of :func:`_time_basis` at the same times."""
        with np.errstate(over="ignore", invalid="ignore"):
            coef = decay * self.z0[rows, None, :] + gain * self.u[rows, None, :]
            phi = self.phi[rows] if nodes else self.phi_j[rows]
            out = np.matmul(coef, np.swapaxes(phi, -1, -2))
        return np.asarray(np.where(np.isnan(out), np.inf, out))

    @property
    def phi_j(self) -> FloatArray:
        """Junction rows of the mode shapes (b, n_phases, n), computed once."""
        cached: FloatArray | None = self.__dict__.get("_phi_j")
        if cached is None:
            cached = np.ascontiguousarray(self.phi[:, self.junction, :])
            object.__setattr__(self, "_phi_j", cached)
        return cached

    def grid(self, horizon: FloatArray, per_decade: int = _GRID_PER_DECADE) -> FloatArray:
        """Times (b, n_grid) from 0 over a log grid spanning each case's time constants
        (``per_decade`` points per decade, from a thousandth of the fastest (a tenth for the
        coarser peak grid, whose first interval is refined) to 40 of the slowest, or to where
        a growing mode has risen by e^700), cut at ``horizon`` (b,) which is the last point."""
        rate = np.maximum(np.abs(self.lam), 1e-300)
        runaway = self.lam[:, 0] <= 0.0
        t_first = (1e-3 if per_decade >= _GRID_PER_DECADE else 1e-1) / rate.max(axis=1)
        t_end = np.where(runaway, _GROWTH / rate[:, 0], _SETTLED / rate.min(axis=1))
        t_end = np.maximum(np.minimum(t_end, horizon), t_first)
        decades = float(np.log10(t_end / t_first).max(initial=0.0))
        n_grid = min(int(np.ceil(per_decade * decades)), _GRID_MAX) + 2
        frac = np.linspace(0.0, 1.0, n_grid)
        inner = t_first[:, None] * (t_end / t_first)[:, None] ** frac
        last = np.where(np.isfinite(horizon), np.maximum(horizon, t_end), t_end)
        return np.concatenate([np.zeros((self.lam.shape[0], 1)), inner, last[:, None]], axis=1)


def _time_basis(lam: FloatArray, t: FloatArray) -> tuple[FloatArray, FloatArray]:
    """exp(-lam t) and t exprel(-lam t), each (b, n_t, n), for rates lam (b, n) at times t
    (b, n_t): T(t) = Phi [exp(-lam t) z0 + t exprel(-lam t) u]."""
    x = -lam[:, None, :] * t[..., None]
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        # A settled mode (exp below -_UNDERFLOW, < 1e-260) is set to 0: tinier values would
        # make subnormal numbers, on which arithmetic takes a slow path (25 times slower).
        decay = np.exp(np.maximum(x, -_UNDERFLOW))
        decay[x < -_UNDERFLOW] = 0.0
        # t exprel(x) from the same exponential; its series where (e - 1) / x would cancel.
        gain = np.subtract(decay, 1.0)
        gain /= x
        series = ~(np.abs(x) > 1e-4)
        near = x[series]
        gain[series] = 1.0 + near * (0.5 + near / 6.0)
        gain *= t[..., None]
    return decay, gain


def _above(temps_c: FloatArray, line_c: FloatArray) -> FloatArray:
    """temps - line, -inf for an ignored phase (line +inf) even where a runaway gave inf, and
    +inf where a runaway passed float range (NaN from inf - inf): the hot side."""
    with np.errstate(invalid="ignore"):
        over = np.where(np.isnan(temps_c - line_c), np.inf, temps_c - line_c)
    return np.asarray(np.where(np.isposinf(line_c), -np.inf, over))


def _batch(
    net: ThermalNetwork,
    initial_c: npt.ArrayLike,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    offset_c: npt.ArrayLike,
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """initial_c, p0_w, slope_w_per_k and the per-phase offsets checked and broadcast to
    n_cases: (n_cases, n_nodes) and three (n_cases, n_phases)."""
    p0 = _phase_values(net, "p0_w", p0_w)
    slope = _phase_values(net, "slope_w_per_k", slope_w_per_k)
    offset = np.array(offset_c, dtype=np.float64)
    if np.any(np.isnan(offset)) or offset.ndim == 0 or offset.shape[-1] != net.n_phases:
        raise ValueError("limit_c must have shape (..., n_phases) and no NaN")
    temp0 = _finite("initial_c", initial_c)
    if temp0.ndim == 0 or temp0.shape[-1] != net.n_nodes:
        raise ValueError("initial_c must have shape (..., n_nodes)")
    shapes = (p0.shape[:-1], slope.shape[:-1], offset.shape[:-1], temp0.shape[:-1])
    batch = np.broadcast_shapes(*shapes)
    if len(batch) > 1:
        raise ValueError("thermal crossings and peaks take at most one batch axis (n_cases)")
    n_cases = batch[0] if batch else 1
    p0, slope, offset = (np.broadcast_to(x, (n_cases, net.n_phases)) for x in (p0, slope, offset))
    return np.broadcast_to(temp0, (n_cases, net.n_nodes)), p0, slope, offset


def _cases(
    net: ThermalNetwork,
    initial_c: npt.ArrayLike,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: float,
    offset_c: npt.ArrayLike,
) -> tuple[_Cases, FloatArray]:
    """Modal solution of every case and the per-phase offsets, both broadcast to n_cases."""
    temp0, p0, slope, offset = _batch(net, initial_c, p0_w, slope_w_per_k, offset_c)
    return _modal(net, temp0, p0, slope, _finite("ambient_c", ambient_c)), offset


def _modal(
    net: ThermalNetwork, temp0: FloatArray, p0: FloatArray, slope: FloatArray, ambient: FloatArray
) -> _Cases:
    """:class:`_Cases` of the cases as :func:`_batch` gives them."""
    # Cases that share their slopes share their modes (e.g. one rail state at several
    # durations): one eigen-decomposition each.
    distinct, which = np.unique(slope, axis=0, return_inverse=True)
    lam, phi = _modes(_system_matrix(net, distinct), net.capacitance_j_per_k)
    lam, phi = lam[which.reshape(-1)], phi[which.reshape(-1)]
    z0 = np.einsum("bnm,bn->bm", phi, net.capacitance_j_per_k * temp0)
    u = np.einsum("bnm,bn->bm", phi, _injection(net, p0, ambient))
    return _Cases(lam, phi, z0, u, net.junction_node)


# What a shortcut below may leave between a bound and a line, relative to the temperatures
# involved; and the largest condition of the modal problem, C^-1/2 A C^-1/2, for which it
# holds (see :func:`_settles_below`).
_CLEARANCE = 1e-3
_MAX_MODAL_CONDITION = 1e8


def _settles_below(
    net: ThermalNetwork,
    temp0: FloatArray,
    p0: FloatArray,
    slope: FloatArray,
    ambient: FloatArray,
    line_c: FloatArray,
) -> bool:
    """Whether every case provably stays below its lines (np.inf: ignored) for ever, from
    one LU solve per case and no eigen-decomposition.

    The deviation from the steady state x, d = T - x, obeys C d' = -A d; A has no positive
    off-diagonal entry, so exp(-C^-1 A t) >= 0, and with y = A^-1 1 > 0 (stable), w(t) =
    exp(-C^-1 A t) y starts with C w' = -1 < 0 and keeps falling: w(t) <= y (Berman and
    Plemmons, ch. 6). With d(0) <= a y, a = max(0, max_i d_i(0) / y_i), it follows that
    T(t) <= x + a y for all t >= 0. Where that bound is ``_CLEARANCE`` of the temperatures
    short of every line, the modal solution as computed stays below too: its eigen-
    decomposition is exact for a matrix within about n eps ||M|| of M (backward stable), which
    moves the solution by about n eps cond(M) sqrt(n C_max / C_min) of the temperatures,
    3e-6 at the cap on that product, and its slowest decay rate stays positive (runaway
    False). The answer is "never" for every case, as the scan would find.
    """
    a = _system_matrix(net, slope)
    steady, stable, condition, probe = _solve_stable(a, _injection(net, p0, ambient))
    cap = net.capacitance_j_per_k
    # cond(M) <= cond(A) C_max / C_min, and the modal rounding grows with sqrt(C_max / C_min)
    spread = (cap.max() / cap.min()) ** 1.5
    with np.errstate(invalid="ignore", divide="ignore"):
        lift = np.max(np.maximum(temp0 - steady, 0.0) / probe, axis=-1)
        bound = (steady + lift[:, None] * probe)[:, net.junction_node]
        scale = np.abs(temp0).max(axis=-1) + np.abs(steady).max(axis=-1) + lift * probe.max(-1)
        clear = (bound + _CLEARANCE * scale[:, None] < line_c) | np.isposinf(line_c)
    sound = stable & (condition * spread < _MAX_MODAL_CONDITION)
    return bool(np.all(sound & np.all(clear, axis=1)))


def _never_reaches(cases: _Cases, line_c: FloatArray, until_s: FloatArray) -> BoolArray:
    """Cases (n_cases,) whose junctions stay below their lines (np.inf: ignored) over
    0 <= t <= until_s (n_cases,).

    With every lam > 0 the exact solution is T_j(t) = sum_k Phi_jk s_k + a_jk exp(-lam_k t)
    with s = u / lam (the steady state in modal form) and a_jk = Phi_jk (z0_k - s_k); over
    the window each term is at most max(a_jk, a_jk exp(-lam_k until_s)), which bounds T_j.
    The bound is taken 1e-9 of sum_k |Phi_jk| (|z0_k| + |s_k|) short of the line: the exact
    solution as evaluated on a grid errs by a few float64 epsilons (2.2e-16) of that sum, so
    a case passed here is one a scan of the window would find below its lines at every
    point (the hot side kept).
    """
    stable = cases.lam[:, 0] > 0.0
    lam = np.where(stable[:, None], cases.lam, 1.0)
    settled = cases.u / lam
    phi = cases.phi_j
    swing = phi * (cases.z0 - settled)[:, None, :]
    fade = np.exp(-lam * until_s[:, None])[:, None, :]
    bound = np.sum(phi * settled[:, None, :] + np.maximum(swing, swing * fade), axis=-1)
    scale = np.sum(np.abs(phi) * (np.abs(cases.z0) + np.abs(settled))[:, None, :], axis=-1)
    below = np.isfinite(bound) & (bound + 1e-9 * scale < line_c)
    return np.asarray(stable & np.all(below | np.isposinf(line_c), axis=1))


def _horizon(value: npt.ArrayLike | None, n_cases: int) -> FloatArray:
    if value is None:
        return np.full(n_cases, np.inf)
    horizon = np.array(value, dtype=np.float64)
    if np.any(np.isnan(horizon)) or not np.all(horizon > 0.0):
        raise ValueError("horizon_s must be > 0")
    return np.array(np.broadcast_to(horizon, (n_cases,)))


def time_to_limit_batch_s(
    net: ThermalNetwork,
    initial_c: npt.ArrayLike,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: float,
    limit_c: npt.ArrayLike,
    *,
    horizon_s: npt.ArrayLike | None = None,
) -> LimitCrossings:
    """First crossing of any junction line with losses P = p0 + s T_j held, per case.

    The linear system including -E diag(s) E^T is solved exactly (sums of exponentials);
    the first crossing is bracketed on the log-spaced time grid of :meth:`_Cases.grid` and
    refined by :func:`bracketed_root` to 1e-12 relative, reporting the early end of the
    bracket. A junction that crosses and drops back within one grid interval would be
    missed; with 64 points per decade that needs a pathological network.

    initial_c: (n_nodes,) or (n_cases, n_nodes); p0_w, slope_w_per_k: (n_cases, n_phases) or
    (n_phases,); limit_c: (n_phases,) or (n_cases, n_phases), np.inf for a phase to ignore;
    horizon_s: float or (n_cases,): crossings later than this count as never (np.inf).

    >>> chain = CauerStages(np.array([2.0]), np.array([0.5]))
    >>> net = build_coupled_network([chain] * 2, board_to_ambient_k_per_w=1.0,
    ...                             board_c_j_per_k=5.0)
    >>> hits = time_to_limit_batch_s(net, np.full(3, 25.0), [[2.0, 2.2], [0.0, 2.2]],
    ...                              np.zeros(2), 25.0, [[32.0, 32.0], [np.inf, 32.0]])
    >>> np.round(hits.time_s, 3), hits.phase.tolist()  # phase 0 lost: the board runs cooler
    (array([7.933,   inf]), [1, -1])
    """
    temp0, p0, slope, limit = _batch(net, initial_c, p0_w, slope_w_per_k, limit_c)
    ambient = _finite("ambient_c", ambient_c)
    n_cases = limit.shape[0]
    horizon = _horizon(horizon_s, n_cases)
    if _settles_below(net, temp0, p0, slope, ambient, limit):
        never = np.full(n_cases, np.inf)
        return LimitCrossings(never, np.full(n_cases, -1, np.intp), np.zeros(n_cases, bool))
    cases = _modal(net, temp0, p0, slope, ambient)

    def excess(rows: IntArray, t: FloatArray) -> FloatArray:
        return np.asarray(np.max(_above(cases.at_c(rows, t), limit[rows, None, :]), axis=-1))

    # Only the cases that may reach a line are scanned; the grid is that of every case (its
    # size is set by the widest span of time constants among them).
    grid = cases.grid(horizon)
    scan = np.flatnonzero(~_never_reaches(cases, limit, grid[:, -1]))
    runaway = cases.lam[:, 0] <= 0.0
    if not scan.size:
        return LimitCrossings(np.full(n_cases, np.inf), np.full(n_cases, -1, np.intp), runaway)
    grid = grid[scan]
    values = excess(scan, grid)
    # Touching the line counts as reaching it; a sign change past it is refined.
    touched = values >= 0.0
    at = np.arange(scan.size)
    first_touch = np.where(touched.any(axis=1), grid[at, np.argmax(touched, axis=1)], np.inf)
    above = values > 0.0
    first = np.argmax(above, axis=1)
    time = np.full(n_cases, np.inf)
    time[scan] = np.where(touched[:, 0], 0.0, first_touch)
    crossing = np.flatnonzero(~touched[:, 0] & above.any(axis=1))
    rows = scan[crossing]
    past = time.copy()  # a time at which the crossing phase is at or past its line
    # Evaluated alone a grid point may round to the other side of the line: such a crossing is
    # taken at the bracket's early end (lo) or, past it only by rounding, at its late end.
    lo, hi = grid[crossing, first[crossing] - 1], grid[crossing, first[crossing]]
    f_lo, f_hi = excess(rows, lo[:, None])[:, 0], excess(rows, hi[:, None])[:, 0]
    time[rows] = np.where(f_lo > 0.0, lo, np.where(f_hi <= 0.0, hi, time[rows]))
    past[rows] = np.where(f_lo > 0.0, lo, hi)
    clean = (f_lo <= 0.0) & (f_hi > 0.0)
    rows, lo, hi = rows[clean], lo[clean], hi[clean]
    if rows.size:
        root, late = bracketed_root(lambda t: excess(rows, t[:, None])[:, 0], lo, hi, rtol=1e-12)
        early = root < time[rows]
        past[rows] = np.where(early, late, time[rows])
        time[rows] = np.where(early, root, time[rows])
    time = np.where(time <= horizon, time, np.inf)
    hit = np.flatnonzero(np.isfinite(time))
    # The phase that is past its line at the late end of the bracket (the early end, which is
    # reported, may still be just short of it).
    phase = np.full(n_cases, -1, dtype=np.intp)
    phase[hit] = np.argmax(_above(cases.at_c(hit, past[hit, None])[:, 0], limit[hit]), axis=1)
    return LimitCrossings(time_s=time, phase=phase, runaway=runaway)


@dataclass(frozen=True, eq=False)
class Peaks:
    """Per case (n_cases,): the largest excess of a junction over its offset, when, and which
    phase (-1 if none); ``value`` is +inf where a runaway grows without bound in the window."""

    value: FloatArray
    time_s: FloatArray
    phase: IntArray


def peak_batch(
    net: ThermalNetwork,
    initial_c: npt.ArrayLike,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: float,
    offset_c: npt.ArrayLike,
    *,
    duration_s: npt.ArrayLike,
) -> Peaks:
    """Largest max_j (T_j(t) - offset_j) over 0 <= t <= duration with losses P = p0 + s T_j.

    Exact solution on the log grid of :meth:`_Cases.grid` (which ends at the duration, or
    where the state has settled when the duration is longer or infinite, where the steady
    state is the limit), the grid's largest point refined by zooming in between its
    neighbours (:data:`_ZOOM_ROUNDS` rounds of :data:`_ZOOM_POINTS` points, to 1.5e-5 of
    the interval); the largest value seen is kept, so the result never understates the grid.
    offset_c: (n_phases,) or (n_cases, n_phases), np.inf for a phase to ignore (0 for plain
    temperatures); duration_s: float or (n_cases,), np.inf allowed. Other shapes as in
    :func:`time_to_limit_batch_s`.

    >>> chain = CauerStages(np.array([2.0]), np.array([0.5]))
    >>> net = build_coupled_network([chain], board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> hot = steady_state_c(net, [4.0], [0.0], 25.0)  # 37 and 29 degC, then the loss halves:
    >>> peak = peak_batch(net, hot, [2.0], [0.0], 25.0, [0.0], duration_s=np.inf)
    >>> print(f"{peak.value[0]:.3f} degC at {peak.time_s[0]:.1f} s")  # the start is the peak
    37.000 degC at 0.0 s
    >>> cold = np.array([[25.0, 25.0]])
    >>> print(f"{peak_batch(net, cold, [2.0], [0.0], 25.0, [0.0], duration_s=1e9).value[0]:.3f}")
    31.000
    """
    p0 = _phase_values(net, "p0_w", p0_w)
    slope = _phase_values(net, "slope_w_per_k", slope_w_per_k)
    if p0.ndim > 2 or slope.ndim > 2:
        raise ValueError("thermal crossings and peaks take at most one batch axis (n_cases)")
    slope = np.broadcast_to(slope, (*np.broadcast_shapes(p0.shape, slope.shape)[:-1], p0.shape[-1]))
    family = peak_family(net, initial_c, slope, ambient_c, offset_c, duration_s=duration_s)
    every = np.arange(family.n_cases)
    return family(every, np.broadcast_to(p0, (family.n_cases, net.n_phases)))


@dataclass(frozen=True, eq=False)
class PeakFamily:
    """Peaks of n_cases systems whose slopes are fixed and whose constant losses p0 vary: the
    eigen-decomposition is done once, each call costs only the scan of the exact transient.

    Call with ``rows`` (k,) case indices and ``p0_w`` (k, n_phases) in W: the
    :class:`Peaks` of those cases with losses P = p0 + s T_j (s fixed at construction).
    """

    cases: _Cases
    offset: FloatArray
    duration: FloatArray
    drive: FloatArray  # (n_cases, n, n_phases): modal injection per watt at each junction
    end: FloatArray  # (n_cases,) where the window ends (or the state has settled), s
    grid: FloatArray  # (n_cases, n_grid) the scan's times and their basis, computed once
    decay: FloatArray
    gain: FloatArray

    @property
    def n_cases(self) -> int:
        return int(self.offset.shape[0])

    def __call__(self, rows: IntArray, p0_w: FloatArray) -> Peaks:
        c = self.cases
        whole = rows.size == self.n_cases and bool(np.all(rows == np.arange(rows.size)))

        def pick(x: FloatArray) -> FloatArray:  # no copy of the big arrays for every row
            return x if whole else x[rows]

        u = pick(c.u) + np.matmul(pick(self.drive), p0_w[..., None])[..., 0]
        sub = _Cases(pick(c.lam), pick(c.phi), pick(c.z0), u, c.junction)
        scan = (pick(self.grid), pick(self.decay), pick(self.gain))
        return _peaks(sub, pick(self.offset), pick(self.duration), pick(self.end), scan)


def peak_family(
    net: ThermalNetwork,
    initial_c: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: float,
    offset_c: npt.ArrayLike,
    *,
    duration_s: npt.ArrayLike,
) -> PeakFamily:
    """The :class:`PeakFamily` of the cases given by ``slope_w_per_k`` (n_phases,) or
    (n_cases, n_phases) and the other arguments as in :func:`peak_batch`.

    >>> chain = CauerStages(np.array([2.0]), np.array([0.5]))
    >>> net = build_coupled_network([chain], board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> family = peak_family(net, [25.0, 25.0], [0.0], 25.0, [0.0], duration_s=1e9)
    >>> family(np.array([0, 0]), np.array([[2.0], [4.0]])).value.round(3).tolist()
    [31.0, 37.0]
    """
    slope = _phase_values(net, "slope_w_per_k", slope_w_per_k)
    cases, offset = _cases(net, initial_c, np.zeros_like(slope), slope, ambient_c, offset_c)
    n_cases = offset.shape[0]
    duration = np.array(np.broadcast_to(np.asarray(duration_s, dtype=np.float64), (n_cases,)))
    if np.any(np.isnan(duration)) or np.any(duration < 0.0):
        raise ValueError("duration_s must be >= 0")
    # u = Phi^T f and f is E p0 plus the ambient term: the junction rows of Phi carry p0.
    drive = np.ascontiguousarray(np.swapaxes(cases.phi_j, -1, -2))
    unbounded = (cases.lam[:, 0] <= 0.0) & ~np.isfinite(duration)  # grows past every bound
    settled = _SETTLED / np.maximum(cases.lam[:, 0], 1e-300)
    end = np.where(np.isfinite(duration), duration, np.where(unbounded, 0.0, settled))
    grid = cases.grid(np.where(end > 0.0, end, 1e-300), _PEAK_PER_DECADE)
    grid = np.where(end[:, None] > 0.0, grid, 0.0)
    return PeakFamily(cases, np.array(offset), duration, drive, end, grid,
                      *_time_basis(cases.lam, grid))  # fmt: skip


def _peaks(
    cases: _Cases,
    offset: FloatArray,
    duration: FloatArray,
    end: FloatArray,
    scan: tuple[FloatArray, FloatArray, FloatArray],
) -> Peaks:
    """:func:`peak_batch` on prepared cases: ``end`` and the scan's (grid, decay, gain) as
    :class:`PeakFamily` computes them."""
    n_cases = offset.shape[0]
    value, time = np.full(n_cases, -np.inf), np.zeros(n_cases)
    phase = np.full(n_cases, -1, dtype=np.intp)

    def keep(rows: IntArray, t: FloatArray, temps: FloatArray, *, last: bool = False) -> IntArray:
        """Keep the best of temps (len(rows), n_t, n_phases) at times t where it beats what
        is kept; return the index of each row's best time (the last of equal values with
        ``last``: the grid's end repeats where the window ends before the state settles)."""
        over = _above(temps, offset[rows, None, :])
        values = np.max(over, axis=-1)
        n_t = t.shape[1]
        best = n_t - 1 - np.argmax(values[:, ::-1], axis=1) if last else np.argmax(values, 1)
        at = np.arange(rows.size)
        better = values[at, best] > value[rows]
        value[rows] = np.where(better, values[at, best], value[rows])
        time[rows] = np.where(better, t[at, best], time[rows])
        phase[rows] = np.where(better, np.argmax(over[at, best], axis=-1), phase[rows])
        return np.asarray(best)

    # Every node warming at t = 0, dT/dt = Phi (u - lam z0) >= 0, keeps warming: dT/dt obeys
    # the same linear system, whose propagator exp(-C^-1 A t) is non-negative because A has
    # no positive off-diagonal entry (Berman and Plemmons, ch. 6). Such a case peaks at the
    # end of its window (or at its steady state), so only the others need the grid.
    warming = np.matmul(cases.phi, (cases.u - cases.lam * cases.z0)[..., None])[..., 0]
    rising = np.all(warming >= 0.0, axis=1)
    unbounded = (cases.lam[:, 0] <= 0.0) & ~np.isfinite(duration)  # grows past every bound
    up = np.flatnonzero(rising & ~unbounded)
    if up.size:
        ends = np.stack([np.zeros(up.size), end[up]], axis=1)
        keep(up, ends, cases.at_c(up, ends))
    rows = np.flatnonzero(~rising & ~unbounded)
    if rows.size:
        grid = scan[0][rows]
        best = keep(rows, grid, cases.combine(rows, scan[1][rows], scan[2][rows]), last=True)
        inner = (best > 0) & (best < grid.shape[1] - 1)
        lo, hi = grid[inner, best[inner] - 1], grid[inner, best[inner] + 1]
        rows = rows[inner]
        # Zoom: a uniform grid between the best point's neighbours, then between the new best
        # point's neighbours, and so on (vectorised; one call per round).
        frac = np.linspace(0.0, 1.0, _ZOOM_POINTS)
        for _ in range(_ZOOM_ROUNDS if rows.size else 0):
            ts = lo[:, None] + (hi - lo)[:, None] * frac
            best = keep(rows, ts, cases.at_c(rows, ts))
            at = np.arange(rows.size)
            lo = ts[at, np.maximum(best - 1, 0)]
            hi = ts[at, np.minimum(best + 1, _ZOOM_POINTS - 1)]
    wild = np.flatnonzero(unbounded)  # past every bound: the hottest phase now is named
    if wild.size:
        keep(wild, np.zeros((wild.size, 1)), cases.at_c(wild, np.zeros((wild.size, 1))))
        value[wild], time[wild] = np.inf, np.inf
    phase = np.where(np.isfinite(offset).any(axis=1), phase, -1)
    return Peaks(value=value, time_s=time, phase=phase.astype(np.intp))


def propagate_c(
    net: ThermalNetwork,
    initial_c: npt.ArrayLike,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: float,
    t_s: npt.ArrayLike,
) -> FloatArray:
    """Exact node temperatures (n_cases, n_t, n_nodes) at times t_s (n_cases, n_t) >= 0 from
    ``initial_c`` with losses P = p0 + s T_j held; shapes as in :func:`time_to_limit_batch_s`.

    >>> chain = CauerStages(np.array([2.0]), np.array([0.5]))
    >>> net = build_coupled_network([chain], board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> np.round(propagate_c(net, [25.0, 25.0], [2.0], [0.0], 25.0, [[0.0, 1e4]]), 3).tolist()
    [[[25.0, 25.0], [31.0, 27.0]]]
    """
    cases, _ = _cases(net, initial_c, p0_w, slope_w_per_k, ambient_c, np.zeros(net.n_phases))
    n_cases = cases.lam.shape[0]
    t = _finite("t_s", t_s, nonnegative=True)
    if t.ndim != 2 or t.shape[0] not in (1, n_cases):
        raise ValueError("t_s must have shape (n_cases, n_t)")
    return cases.at_c(np.arange(n_cases), np.broadcast_to(t, (n_cases, t.shape[1])), nodes=True)


def piecewise_c(
    net: ThermalNetwork,
    initial_c: npt.ArrayLike,
    duration_s: npt.ArrayLike,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: float,
) -> FloatArray:
    """Node temperatures (n_stretches + 1, n_nodes) at the ends of consecutive stretches.

    Stretch k lasts duration_s[k] with losses P = p0_k + s_k T_j held as functions of the
    temperature (not of time), so each stretch is solved exactly: no step, no hold error.
    The eigen-decompositions are batched (256 stretches at a time); the chaining of one
    stretch's end state into the next is the one sequential part, a few small products per
    stretch. Row 0 is ``initial_c``. A runaway stretch long enough to leave float range
    gives inf from there on.

    duration_s: (n_stretches,) >= 0; p0_w, slope_w_per_k: (n_stretches, n_phases).

    >>> chain = CauerStages(np.array([2.0]), np.array([0.5]))
    >>> net = build_coupled_network([chain], board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> ends = piecewise_c(net, [25.0, 25.0], [1e4, 1e4], [[2.0], [0.0]], [[0.0], [0.0]], 25.0)
    >>> np.round(ends, 3).tolist()  # settles at 25 + 2 W x (2 + 1) K/W, then cools again
    [[25.0, 25.0], [31.0, 27.0], [25.0, 25.0]]
    """
    duration = _finite("duration_s", duration_s, nonnegative=True)
    p0 = _phase_values(net, "p0_w", p0_w)
    slope = _phase_values(net, "slope_w_per_k", slope_w_per_k)
    if duration.ndim != 1 or p0.shape != (duration.size, net.n_phases) or slope.shape != p0.shape:
        raise ValueError("duration_s (n,) and p0_w, slope_w_per_k (n, n_phases) must agree")
    temp = np.array(_finite("initial_c", initial_c), dtype=np.float64)
    if temp.shape != (net.n_nodes,):
        raise ValueError(f"initial_c must have shape (n_nodes,) = ({net.n_nodes},)")
    out = np.empty((duration.size + 1, net.n_nodes))
    out[0] = temp
    cap = net.capacitance_j_per_k
    ambient = _finite("ambient_c", ambient_c)
    for lo in range(0, duration.size, 256):
        part = slice(lo, min(duration.size, lo + 256))
        lam, phi = _modes(_system_matrix(net, slope[part]), cap)
        u = np.einsum("bnm,bn->bm", phi, _injection(net, p0[part], ambient))
        x = -lam * duration[part, None]
        with np.errstate(over="ignore", invalid="ignore"):
            decay, gain = np.exp(x), duration[part, None] * special.exprel(x) * u
            for k in range(lam.shape[0]):
                temp = phi[k] @ (decay[k] * (phi[k].T @ (cap * temp)) + gain[k])
                out[lo + k + 1] = temp
    return np.where(np.isnan(out), np.inf, out)


def time_to_limit_s(
    net: ThermalNetwork,
    initial_c: npt.ArrayLike,
    p0_w: npt.ArrayLike,
    slope_w_per_k: npt.ArrayLike,
    ambient_c: float,
    limit_c: npt.ArrayLike,
    *,
    horizon_s: float | None = None,
) -> LimitCrossing:
    """First crossing of any junction limit for one case; see :func:`time_to_limit_batch_s`.

    initial_c: (n_nodes,); p0_w, slope_w_per_k, limit_c: (n_phases,).

    >>> chain = CauerStages(np.array([2.0]), np.array([0.5]))
    >>> net = build_coupled_network([chain], board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    >>> hit = time_to_limit_s(net, [25.0, 25.0], [2.0], [0.0], 25.0, [30.0])
    >>> print(f"{hit.time_s:.3f} s, phase {hit.phase}, runaway {hit.runaway}")
    5.981 s, phase 0, runaway False
    >>> time_to_limit_s(net, [25.0, 25.0], [2.0], [0.0], 25.0, [32.0]).time_s  # settles at 31
    inf
    """
    for name, value, ndim in (
        ("initial_c", initial_c, 1),
        ("p0_w", p0_w, 1),
        ("slope_w_per_k", slope_w_per_k, 1),
        ("limit_c", limit_c, 1),
    ):
        if np.ndim(value) != ndim:
            raise ValueError(f"{name} must be one-dimensional for a single case")
    batch = time_to_limit_batch_s(
        net, initial_c, p0_w, slope_w_per_k, ambient_c, limit_c, horizon_s=horizon_s
    )
    return LimitCrossing(
        time_s=float(batch.time_s[0]), phase=int(batch.phase[0]), runaway=bool(batch.runaway[0])
    )
