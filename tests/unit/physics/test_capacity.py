"""Unit tests for phaseward.physics.capacity (remaining capacity, loss cases)."""

from math import comb
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from phaseward.physics.capacity import loss_cases, remaining_capacity
from phaseward.physics.losses import PhaseLossParams, loss_coefficients
from phaseward.physics.thermal import CauerStages, ThermalNetwork, build_coupled_network
from phaseward.physics.thermal import steady_state_c as steady

N = 4
CHAIN = CauerStages(np.array([3.0, 5.0]), np.array([0.1, 2.0]))
POINT: dict[str, Any] = {
    "vin_v": 12.0,
    "vout_v": 1.0,
    "fsw_hz": 500e3,
    "inductance_h": 150e-9,
    "dcr_ohm": 0.2e-3,
    "rds_high_ohm": 4e-3,
    "rds_low_ohm": 1e-3,
    "rds_tc_per_k": 0.004,
    "gate_charge_c": 40e-9,
    "drive_v": 5.0,
    "core_loss_w": 0.2,
}


def network() -> ThermalNetwork:
    return build_coupled_network([CHAIN] * N, board_to_ambient_k_per_w=0.5, board_c_j_per_k=300.0)


def params(**changes: Any) -> PhaseLossParams:
    return PhaseLossParams.build(N, **(POINT | changes))


def capacity(**kwargs: Any) -> Any:
    args: dict[str, Any] = {
        "active": np.ones((1, N), dtype=bool),
        "weights": np.ones(N),
        "rated_current_a": np.full(N, 40.0),
        "temp_limit_c": np.full(N, 150.0),
        "ambient_c": 25.0,
    }
    return remaining_capacity(network(), params(), **(args | kwargs))


def junction_c(active: np.ndarray, share: np.ndarray, current: float) -> np.ndarray:
    """Steady junction temperatures at rail current ``current``, straight from the kernels."""
    net = network()
    p0, slope = loss_coefficients(params(), share * current)
    return steady(net, p0 * active, slope * active, 25.0)[net.junction_node]


# --- loss cases ---------------------------------------------------------------------------


@pytest.mark.parametrize("n", [1, 2, 5, 12])
def test_loss_case_counts(n: int) -> None:
    for depth in (1, 2):
        masks, lost = loss_cases(n, depth)
        assert masks.shape == (comb(n, depth), n)
        assert lost.shape == (comb(n, depth), depth)
        assert np.all(masks.sum(axis=1) == n - depth)
        for mask, gone in zip(masks, lost, strict=True):
            assert not mask[gone].any()


def test_loss_cases_among_active_phases() -> None:
    masks, lost = loss_cases(5, 1, active=np.array([True, False, True, True, False]))
    assert lost[:, 0].tolist() == [0, 2, 3]
    assert masks.astype(int).tolist() == [[0, 0, 1, 1, 0], [1, 0, 0, 1, 0], [1, 0, 1, 0, 0]]
    none_left, lost = loss_cases(3, 2, active=np.array([True, False, False]))
    assert none_left.shape == (0, 3)
    assert lost.shape == (0, 2)
    with pytest.raises(ValueError, match="depth"):
        loss_cases(3, 0)
    with pytest.raises(ValueError, match="active"):
        loss_cases(3, 1, active=np.array([1, 1, 1]))


# --- capacity -----------------------------------------------------------------------------


def test_current_bound_equal_phases() -> None:
    masks, _ = loss_cases(N, 1)
    res = capacity(active=np.vstack([np.ones(N, dtype=bool), masks]))
    np.testing.assert_allclose(res.capacity_a, [4 * 40.0] + [3 * 40.0] * N)
    assert res.binding_kind.tolist() == ["rating"] * (N + 1)
    assert np.all(np.isnan(res.junction_c_at_capacity[1:][~masks]))
    assert np.all(res.junction_c_at_capacity[1:][masks] < 150.0)


def test_a_trip_current_below_the_rating_binds_and_says_so() -> None:
    trip = np.array([40.0, 35.0, 40.0, 40.0])
    res = capacity(active=np.ones((1, N), dtype=bool), trip_current_a=trip)
    np.testing.assert_allclose(res.capacity_a, [4 * 35.0])
    assert res.binding_kind.tolist() == ["trip_current"]
    assert res.binding_phase.tolist() == [1]
    with pytest.raises(ValueError, match="trip_current_a"):
        capacity(trip_current_a=np.zeros(N))


def test_weights_are_renormalised_over_active_phases() -> None:
    weights = np.array([0.4, 0.2, 0.2, 0.2])
    res = capacity(active=np.array([[True] * 4, [False, True, True, True]]), weights=weights)
    # all: phase 0 carries 40 % and reaches 40 A at 100 A; phase 0 lost: thirds, 120 A
    np.testing.assert_allclose(res.capacity_a, [100.0, 120.0])
    assert res.binding_phase.tolist() == [0, 1]
    per_case = capacity(active=np.array([[True] * 4]), weights=np.array([weights]))
    assert per_case.capacity_a[0] == pytest.approx(100.0)


def test_thermal_bound_lands_on_the_limit() -> None:
    limit = np.array([48.0, 50.0, 51.0, 52.0])  # at full rating: 54.2 (all), 52.6 (three)
    active = np.array([[True] * 4, [False, True, True, True]])
    res = capacity(active=active, temp_limit_c=limit)
    assert res.binding_kind.tolist() == ["warning_line", "warning_line"]
    assert res.binding_phase.tolist() == [0, 1]
    for k in range(2):
        share = active[k] / active[k].sum()
        at = junction_c(active[k], share, res.capacity_a[k])
        over = junction_c(active[k], share, res.capacity_a[k] * (1.0 + 2e-6))
        assert np.max((at - limit)[active[k]]) <= 0.0
        assert np.max((over - limit)[active[k]]) > 0.0
        np.testing.assert_allclose(res.junction_c_at_capacity[k][active[k]], at[active[k]])


def test_no_active_phase_gives_nothing() -> None:
    res = capacity(active=np.zeros((2, N), dtype=bool))
    assert res.capacity_a.tolist() == [0.0, 0.0]
    assert res.binding_kind.tolist() == ["none", "none"]
    assert res.binding_phase.tolist() == [-1, -1]
    assert np.all(np.isnan(res.junction_c_at_capacity))


def test_limit_below_idle_temperature_gives_zero_thermal() -> None:
    res = capacity(temp_limit_c=np.full(N, 24.0))
    assert res.capacity_a[0] == 0.0
    assert res.binding_kind[0] == "warning_line"


def test_runaway_below_the_current_limit() -> None:
    # a steep Rds tempco: the feedback runs away between 10 and 20 A per phase; a limit far
    # above any real one puts the capacity just below the runaway point
    net = network()
    hot = params(rds_tc_per_k=0.5, rds_ref_c=0.0)
    res = remaining_capacity(
        net,
        hot,
        active=np.ones((1, N), dtype=bool),
        weights=np.ones(N),
        rated_current_a=np.full(N, 200.0),
        temp_limit_c=np.full(N, 1.0e9),
        ambient_c=25.0,
    )
    assert res.binding_kind[0] == "warning_line"
    cap = res.capacity_a[0]
    assert 0.0 < cap < 4 * 200.0
    p0, slope = loss_coefficients(hot, np.full(N, cap * 1.001 / N))
    _, runaway = steady(net, p0, slope, 25.0, runaway="flag")
    assert bool(runaway)
    assert np.all(res.junction_c_at_capacity[0] <= 1.0e9)


@settings(max_examples=25, deadline=None)
@given(
    lower=st.floats(min_value=40.0, max_value=90.0), extra=st.floats(min_value=0.5, max_value=40.0)
)
def test_capacity_grows_with_the_limit(lower: float, extra: float) -> None:
    less = capacity(temp_limit_c=np.full(N, lower))
    more = capacity(temp_limit_c=np.full(N, lower + extra))
    assert more.capacity_a[0] >= less.capacity_a[0]


def test_batch_equals_single_case_calls() -> None:
    masks, _ = loss_cases(N, 2)
    weights = np.array([1.0, 1.2, 0.9, 1.1])
    limit = np.array([45.0, 48.0, 50.0, 47.0])
    batch = capacity(active=masks, weights=weights, temp_limit_c=limit)
    for k in range(masks.shape[0]):
        one = capacity(active=masks[k : k + 1], weights=weights, temp_limit_c=limit)
        assert one.capacity_a[0] == batch.capacity_a[k]
        assert one.binding_phase[0] == batch.binding_phase[k]


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"active": np.ones((1, N))}, "active"),
        ({"weights": -np.ones(N)}, "weights"),
        (
            {"weights": np.array([0.0, 0.0, 1.0, 1.0]), "active": np.array([[1, 1, 0, 0]], bool)},
            "weights",
        ),
        ({"rated_current_a": np.zeros(N)}, "rated_current_a"),
        ({"temp_limit_c": np.full(N, np.nan)}, "temp_limit_c"),
        ({"temp_limit_c": np.ones(3)}, "temp_limit_c"),
        ({"ambient_c": np.ones(N)}, "ambient_c"),
    ],
)
def test_invalid_arguments(change: dict[str, Any], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        capacity(**change)
