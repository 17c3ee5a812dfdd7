"""Unit tests for phaseward.physics.thermal (Foster/Cauer, coupled network, exact solutions)."""

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from phaseward.physics.thermal import (
    CauerStages,
    FosterStages,
    ThermalNetwork,
    ThermalRunaway,
    bracketed_root,
    build_coupled_network,
    cauer_to_foster,
    foster_to_cauer,
    simulate_c,
    steady_state_c,
    time_to_limit_batch_s,
    time_to_limit_s,
)

CHAINS = [
    CauerStages(np.array([1.5, 4.0]), np.array([0.05, 2.0])),
    CauerStages(np.array([2.0, 3.0, 2.5]), np.array([0.02, 0.5, 8.0])),
    CauerStages(np.array([6.0]), np.array([1.0])),
]


def network() -> ThermalNetwork:
    return build_coupled_network(CHAINS, board_to_ambient_k_per_w=0.7, board_c_j_per_k=150.0)


@st.composite
def fosters(draw: st.DrawFn) -> FosterStages:
    """1..6 stages, time constants 1 ms .. 1000 s at least a factor 1.5 apart."""
    n = draw(st.integers(min_value=1, max_value=6))
    gaps = draw(st.lists(st.floats(min_value=0.18, max_value=1.2), min_size=n, max_size=n))
    log_tau = -3.0 + np.cumsum(gaps)
    r = draw(st.lists(st.floats(min_value=0.01, max_value=20.0), min_size=n, max_size=n))
    return FosterStages(np.array(r), 10.0**log_tau)


# --- Foster and Cauer -------------------------------------------------------------------


def test_foster_validation_names_the_argument() -> None:
    with pytest.raises(ValueError, match="r_k_per_w"):
        FosterStages(np.array([-1.0]), np.array([1.0]))
    with pytest.raises(ValueError, match="tau_s"):
        FosterStages(np.array([1.0, 2.0]), np.array([1.0]))
    with pytest.raises(ValueError, match="c_j_per_k"):
        CauerStages(np.array([1.0]), np.array([0.0]))
    with pytest.raises(ValueError, match="t_s"):
        FosterStages(np.array([1.0]), np.array([1.0])).zth_k_per_w(-1.0)
    with pytest.raises(ValueError, match="distinct"):
        foster_to_cauer(FosterStages(np.array([1.0, 2.0]), np.array([0.5, 0.5])))


def test_zth_keeps_the_shape_of_t() -> None:
    t = np.linspace(0.0, 10.0, 12).reshape(3, 4)
    assert FosterStages(np.array([1.0, 2.0]), np.array([0.1, 3.0])).zth_k_per_w(t).shape == (3, 4)
    assert CHAINS[1].zth_k_per_w(t).shape == (3, 4)


def test_single_cauer_stage_is_a_single_exponential() -> None:
    c = CauerStages(np.array([3.0]), np.array([0.2]))
    t = np.array([0.0, 0.3, 0.6, 5.0])
    np.testing.assert_allclose(c.zth_k_per_w(t), 3.0 * (1.0 - np.exp(-t / 0.6)), rtol=1e-14)


@given(foster=fosters())
def test_foster_cauer_invariants(foster: FosterStages) -> None:
    cauer = foster_to_cauer(foster)
    # steady state: the total resistance; initial slope dZ/dt(0) = sum R/tau = 1/C_1
    assert cauer.r_k_per_w.sum() == pytest.approx(foster.r_k_per_w.sum(), rel=1e-9)
    assert cauer.c_j_per_k[0] == pytest.approx(1.0 / np.sum(foster.r_k_per_w / foster.tau_s))
    t = np.logspace(-5.0, 4.0, 40)
    np.testing.assert_allclose(cauer.zth_k_per_w(t), foster.zth_k_per_w(t), rtol=1e-9)


@given(foster=fosters())
def test_foster_cauer_round_trip(foster: FosterStages) -> None:
    back = cauer_to_foster(foster_to_cauer(foster))
    order = np.argsort(foster.tau_s)
    np.testing.assert_allclose(back.tau_s, foster.tau_s[order], rtol=1e-9)
    np.testing.assert_allclose(back.r_k_per_w, foster.r_k_per_w[order], rtol=1e-9)
    again = foster_to_cauer(back)
    cauer = foster_to_cauer(foster)
    np.testing.assert_allclose(again.r_k_per_w, cauer.r_k_per_w, rtol=1e-9)
    np.testing.assert_allclose(again.c_j_per_k, cauer.c_j_per_k, rtol=1e-9)


def test_zth_rises_monotonically() -> None:
    z = CHAINS[1].zth_k_per_w(np.logspace(-4.0, 2.0, 200))
    assert np.all(np.diff(z) > 0.0)


# --- network ------------------------------------------------------------------------------


def test_coupled_network_structure() -> None:
    net = network()
    assert net.n_nodes == 7
    assert net.n_phases == 3
    assert net.junction_node.tolist() == [0, 2, 5]
    assert net.board_node == 6
    g = net.conductance_w_per_k
    assert g[0, 1] == pytest.approx(-1.0 / 1.5)
    assert g[1, 6] == pytest.approx(-1.0 / 4.0)
    assert g[4, 6] == pytest.approx(-1.0 / 2.5)
    assert g[5, 6] == pytest.approx(-1.0 / 6.0)
    assert g[1, 2] == 0.0  # phases touch only through the board
    np.testing.assert_allclose(g.sum(axis=1), 0.0, atol=1e-15)
    assert net.ambient_conductance_w_per_k.tolist() == [0, 0, 0, 0, 0, 0, pytest.approx(1 / 0.7)]
    np.testing.assert_allclose(
        net.capacitance_j_per_k, [0.05, 2.0, 0.02, 0.5, 8.0, 1.0, 150.0], rtol=1e-15
    )


def _net_args(net: ThermalNetwork) -> dict[str, object]:
    return {
        "conductance_w_per_k": net.conductance_w_per_k,
        "capacitance_j_per_k": net.capacitance_j_per_k,
        "ambient_conductance_w_per_k": net.ambient_conductance_w_per_k,
        "junction_node": net.junction_node,
        "board_node": net.board_node,
    }


def test_network_validation() -> None:
    base = _net_args(network())
    g = np.array(base["conductance_w_per_k"])
    skew = g.copy()
    skew[0, 1] -= 0.1
    skew[0, 0] += 0.1
    positive = g.copy()
    positive[0, 2] = positive[2, 0] = 0.5
    positive[0, 0] -= 0.5
    positive[2, 2] -= 0.5
    cases: list[tuple[dict[str, object], str]] = [
        ({"conductance_w_per_k": skew}, "symmetric"),
        ({"conductance_w_per_k": positive}, "node-to-node"),
        ({"conductance_w_per_k": g + np.eye(7)}, "node-to-node"),
        ({"capacitance_j_per_k": np.zeros(7)}, "capacitance_j_per_k"),
        ({"ambient_conductance_w_per_k": -np.ones(7)}, "ambient_conductance_w_per_k"),
        ({"ambient_conductance_w_per_k": np.zeros(7)}, "path to ambient"),
        ({"junction_node": np.array([0, 0, 5])}, "junction_node"),
        ({"junction_node": np.array([0, 2, 9])}, "junction_node"),
        ({"board_node": 7}, "board_node"),
        ({"board_node": 1.5}, "board_node"),
    ]
    for change, message in cases:
        with pytest.raises(ValueError, match=message):
            ThermalNetwork(**(base | change))  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="board_to_ambient_k_per_w"):
        build_coupled_network(CHAINS, board_to_ambient_k_per_w=0.0, board_c_j_per_k=1.0)
    with pytest.raises(ValueError, match="phase_chains"):
        build_coupled_network([], board_to_ambient_k_per_w=1.0, board_c_j_per_k=1.0)


# --- steady state -------------------------------------------------------------------------


def test_steady_state_shapes_broadcast() -> None:
    net = network()
    temps = steady_state_c(net, np.ones((4, 3)), np.zeros(3), 25.0)
    assert temps.shape == (4, 7)
    temps = steady_state_c(net, np.ones((2, 4, 3)), np.zeros((4, 3)), np.array([[20.0], [30.0]]))
    assert temps.shape == (2, 4, 7)
    np.testing.assert_allclose(temps[1] - temps[0], 10.0, rtol=1e-12)
    with pytest.raises(ValueError, match="p0_w"):
        steady_state_c(net, np.ones(2), np.zeros(3), 25.0)


@given(
    p0=st.lists(st.floats(min_value=0.0, max_value=10.0), min_size=3, max_size=3),
    slope=st.lists(st.floats(min_value=0.0, max_value=0.02), min_size=3, max_size=3),
    ambient=st.floats(min_value=-40.0, max_value=85.0),
)
def test_steady_state_conserves_energy(p0: list[float], slope: list[float], ambient: float) -> None:
    net = network()
    temps = steady_state_c(net, p0, slope, ambient)
    generated = np.sum(np.array(p0) + np.array(slope) * temps[net.junction_node])
    to_ambient = np.sum(net.ambient_conductance_w_per_k * (temps - ambient))
    assert to_ambient == pytest.approx(generated, rel=1e-9, abs=1e-9)
    if ambient >= 0.0:  # losses then stay >= 0, so no node is colder than ambient
        assert np.all(temps >= ambient - 1e-9)  # (the inverse of an M-matrix is >= 0)


@settings(max_examples=60)
@given(slope=st.lists(st.floats(min_value=0.0, max_value=0.6), min_size=3, max_size=3))
def test_runaway_flag_agrees_with_eigenvalues(slope: list[float]) -> None:
    net = network()
    a = net.conductance_w_per_k + np.diag(net.ambient_conductance_w_per_k)
    a[net.junction_node, net.junction_node] -= slope
    lam_min = np.linalg.eigvalsh(a)[0]
    assume(abs(lam_min) > 1e-9)  # at the boundary neither test is decisive
    _, flag = steady_state_c(net, np.ones(3), slope, 25.0, runaway="flag")
    assert bool(flag) == (lam_min < 0.0)


def test_runaway_raises_or_flags_per_case() -> None:
    net = network()
    slope = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 0.5], [0.01, 0.01, 0.01]])
    temps, flag = steady_state_c(net, np.ones(3), slope, 25.0, runaway="flag")
    assert flag.tolist() == [False, True, False]
    assert np.all(np.isnan(temps[1]))
    assert np.all(np.isfinite(temps[[0, 2]]))
    with pytest.raises(ThermalRunaway) as info:
        steady_state_c(net, np.ones(3), slope, 25.0)
    assert isinstance(info.value, ArithmeticError)
    assert info.value.mask.tolist() == [False, True, False]
    assert info.value.cases.tolist() == [[1]]
    with pytest.raises(ValueError, match="runaway"):
        steady_state_c(net, np.ones(3), slope, 25.0, runaway="ignore")  # type: ignore[call-overload]


def test_exactly_singular_case_is_flagged() -> None:
    one = ThermalNetwork(np.zeros((1, 1)), np.ones(1), np.ones(1), np.array([0]), 0)
    temps, flag = steady_state_c(one, [[1.0], [1.0]], [[1.0], [0.5]], 0.0, runaway="flag")
    assert flag.tolist() == [True, False]
    assert temps[1, 0] == pytest.approx(2.0)  # 1 W / (1 - 0.5) W/K


# --- transient ----------------------------------------------------------------------------


def test_single_node_zero_order_hold_recursion() -> None:
    # T_{k+1} = T_amb + (T_k - T_amb) a + (p0 + s T_k) R (1 - a), a = exp(-dt / RC)
    r, c, dt, p0, s = 2.0, 3.0, 0.5, 4.0, 0.1
    one = ThermalNetwork(np.zeros((1, 1)), np.array([c]), np.array([1.0 / r]), np.array([0]), 0)
    temps = simulate_c(
        one, [30.0], dt, np.full((50, 1), p0), np.full((50, 1), s), 20.0, tol_k=1e-12
    )
    a = np.exp(-dt / (r * c))
    expected = [30.0]
    for _ in range(50):
        t = expected[-1]
        expected.append(20.0 + (t - 20.0) * a + (p0 + s * t) * r * (1.0 - a))
    np.testing.assert_allclose(temps[:, 0], expected, rtol=1e-12)


def test_long_trace_crosses_windows_seamlessly() -> None:
    # 20,000 steps span three Picard windows; power and ambient vary every step
    r, c, dt, s = 2.0, 3.0, 0.05, 0.05
    one = ThermalNetwork(np.zeros((1, 1)), np.array([c]), np.array([1.0 / r]), np.array([0]), 0)
    k = np.arange(20_000)
    p0 = 3.0 + 2.0 * np.sin(k / 500.0) + (k % 7 == 0)
    ambient = 25.0 + 5.0 * np.cos(k / 3000.0)
    temps = simulate_c(one, [40.0], dt, p0[:, None], np.full((k.size, 1), s), ambient, tol_k=1e-12)
    a = np.exp(-dt / (r * c))
    expected = np.empty(k.size + 1)
    expected[0] = 40.0
    for i in range(k.size):
        t = expected[i]
        expected[i + 1] = ambient[i] + (t - ambient[i]) * a + (p0[i] + s * t) * r * (1.0 - a)
    np.testing.assert_allclose(temps[:, 0], expected, rtol=1e-11)


def test_simulation_settles_at_the_steady_state() -> None:
    net = network()
    n = 4000
    p0, slope = np.tile([2.0, 3.0, 1.0], (n, 1)), np.tile([0.01, 0.02, 0.005], (n, 1))
    temps = simulate_c(net, np.full(7, 25.0), 0.5, p0, slope, 25.0)
    assert temps.shape == (n + 1, 7)
    np.testing.assert_allclose(temps[-1], steady_state_c(net, p0[0], slope[0], 25.0), atol=1e-6)


def test_ambient_trace_equals_constant_ambient() -> None:
    net = network()
    p0, slope = np.ones((30, 3)), np.full((30, 3), 0.01)
    const = simulate_c(net, np.full(7, 25.0), 0.1, p0, slope, 25.0)
    trace = simulate_c(net, np.full(7, 25.0), 0.1, p0, slope, np.full(30, 25.0))
    np.testing.assert_allclose(trace, const, rtol=1e-13)
    warmer = simulate_c(net, np.full(7, 25.0), 0.1, p0, slope, np.linspace(25.0, 35.0, 30))
    assert np.all(warmer[2:, -1] > const[2:, -1])  # the first step still sees 25 degC


def test_diverging_feedback_raises() -> None:
    net = network()
    p0, slope = np.ones((500, 3)), np.full((500, 3), 2.0)
    with pytest.raises(ThermalRunaway, match="did not settle"):
        simulate_c(net, np.full(7, 25.0), 1.0, p0, slope, 25.0)


def test_simulation_argument_checks() -> None:
    net = network()
    ok = np.ones((5, 3))
    with pytest.raises(ValueError, match="dt_s"):
        simulate_c(net, np.full(7, 25.0), 0.0, ok, ok, 25.0)
    with pytest.raises(ValueError, match="initial_c"):
        simulate_c(net, np.full(6, 25.0), 1.0, ok, ok, 25.0)
    with pytest.raises(ValueError, match="slope_w_per_k"):
        simulate_c(net, np.full(7, 25.0), 1.0, ok, np.ones((4, 3)), 25.0)
    with pytest.raises(ValueError, match="ambient_c"):
        simulate_c(net, np.full(7, 25.0), 1.0, ok, ok, np.ones(4))


# --- time to limit ------------------------------------------------------------------------


def test_time_to_limit_lands_on_the_limit() -> None:
    net = network()
    p0, limit = np.array([3.0, 4.0, 2.0]), np.array([45.0, 58.0, 40.0])  # settle 48, 61, 43
    hit = time_to_limit_s(net, np.full(7, 25.0), p0, np.zeros(3), 25.0, limit)
    assert np.isfinite(hit.time_s)
    assert not hit.runaway
    # with constant power the zero-order-hold simulation is exact at every step
    n = 1000
    temps = simulate_c(
        net, np.full(7, 25.0), hit.time_s / n, np.tile(p0, (n, 1)), np.zeros((n, 3)), 25.0
    )
    junction = temps[:, net.junction_node]
    assert junction[-1, hit.phase] == pytest.approx(limit[hit.phase], abs=1e-9)
    assert np.all(junction[:-1] < limit)
    hotter = time_to_limit_s(net, np.full(7, 25.0), p0, np.full(3, 0.02), 25.0, limit)
    assert hotter.time_s < hit.time_s  # temperature feedback brings the crossing forward


def test_time_to_limit_of_a_single_node_is_logarithmic() -> None:
    r, c = 2.0, 5.0
    one = ThermalNetwork(np.zeros((1, 1)), np.array([c]), np.array([1.0 / r]), np.array([0]), 0)
    hit = time_to_limit_s(one, [25.0], [10.0], [0.0], 25.0, [40.0])
    # T = 25 + 20 (1 - exp(-t / 10)) reaches 40 at t = 10 ln 4
    assert hit.time_s == pytest.approx(10.0 * np.log(4.0), rel=1e-10)
    assert hit.phase == 0


def test_time_to_limit_never_within_horizon_or_already_there() -> None:
    net = network()
    p0, slope = np.array([3.0, 4.0, 2.0]), np.zeros(3)
    never = time_to_limit_s(net, np.full(7, 25.0), p0, slope, 25.0, np.full(3, 200.0))
    assert never.time_s == np.inf
    assert never.phase == -1
    exact = time_to_limit_s(net, np.full(7, 25.0), p0, slope, 25.0, np.full(3, 60.0))
    short = time_to_limit_s(
        net, np.full(7, 25.0), p0, slope, 25.0, np.full(3, 60.0), horizon_s=exact.time_s * 0.99
    )
    assert short.time_s == np.inf
    hot = np.full(7, 25.0)
    hot[net.junction_node[2]] = 70.0
    now = time_to_limit_s(net, hot, p0, slope, 25.0, np.full(3, 60.0))
    assert (now.time_s, now.phase) == (0.0, 2)
    ignored = time_to_limit_s(net, hot, p0, slope, 25.0, np.array([60.0, 60.0, np.inf]))
    assert ignored.phase != 2


def test_runaway_is_flagged_and_its_crossing_found() -> None:
    net = network()
    p0, slope = np.array([1.0, 1.0, 1.0]), np.array([0.0, 0.0, 0.5])
    hit = time_to_limit_s(net, np.full(7, 25.0), p0, slope, 25.0, np.full(3, 150.0))
    assert hit.runaway
    assert hit.phase == 2
    assert np.isfinite(hit.time_s)


def test_batch_equals_single_cases() -> None:
    net = network()
    p0 = np.array([[3.0, 4.0, 2.0], [0.0, 5.0, 2.0], [1.0, 1.0, 1.0]])
    slope = np.array([[0.01, 0.02, 0.0], [0.0, 0.03, 0.01], [0.0, 0.0, 0.5]])
    limit = np.array([[80.0, 80.0, 80.0], [np.inf, 80.0, 80.0], [150.0, 150.0, 150.0]])
    batch = time_to_limit_batch_s(net, np.full(7, 25.0), p0, slope, 25.0, limit)
    for k in range(3):
        one = time_to_limit_s(net, np.full(7, 25.0), p0[k], slope[k], 25.0, limit[k])
        assert batch.time_s[k] == pytest.approx(one.time_s, rel=1e-9)
        assert (batch.phase[k], batch.runaway[k]) == (one.phase, one.runaway)
    with pytest.raises(ValueError, match="one-dimensional"):
        time_to_limit_s(net, np.full(7, 25.0), p0, slope, 25.0, limit)
    with pytest.raises(ValueError, match="limit_c"):
        time_to_limit_batch_s(net, np.full(7, 25.0), p0, slope, 25.0, np.full(3, np.nan))


# --- root bracketing ----------------------------------------------------------------------


def test_bracketed_root_handles_kinks_and_infinities() -> None:
    def f(x: np.ndarray) -> np.ndarray:
        kinked = np.maximum(x - 1.0, 3.0 * (x - 1.0))
        return np.where(x > 5.0, np.inf, kinked)

    lo, hi = bracketed_root(f, np.array([0.0, -2.0]), np.array([6.0, 50.0]), rtol=1e-13)
    np.testing.assert_allclose(hi, 1.0, rtol=1e-12)
    assert np.all(f(lo) <= 0.0)
    assert np.all(f(hi) > 0.0)
    with pytest.raises(ValueError, match="bracket"):
        bracketed_root(f, np.array([2.0]), np.array([3.0]), rtol=1e-6)


def test_a_runaway_past_float_range_beside_an_ignored_phase_is_not_a_nan() -> None:
    """Regression (found by the ingest property test): a runaway overflowing to inf minus the
    +inf line of an ignored phase gave NaN and a RuntimeWarning instead of "crossed"."""
    from phaseward.physics.thermal import peak_batch

    chain = CauerStages(np.array([2.0]), np.array([0.5]))
    net = build_coupled_network([chain] * 2, board_to_ambient_k_per_w=1.0, board_c_j_per_k=5.0)
    slope = np.array([5.0, 5.0])  # far past the conductance to ambient: no steady state
    peak = peak_batch(net, np.full(3, 25.0), [1.0, 1.0], slope, 25.0, [np.inf, 0.0],
                      duration_s=1e9)  # fmt: skip
    assert peak.value[0] == np.inf
    assert peak.phase[0] == 1
    hit = time_to_limit_batch_s(net, np.full(3, 25.0), [1.0, 1.0], slope, 25.0, [np.inf, 1e300])
    assert np.isfinite(hit.time_s[0])
    assert hit.phase[0] == 1
