"""Unit tests for phaseward.physics.rehearsal (replaying a trace against protection settings).

The small traces sample once a second unless stated, so debounce arithmetic is exact; the
expected trips are worked out by hand in the comments.
"""

from collections.abc import Sequence
from dataclasses import asdict

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from phaseward.physics.rehearsal import (
    RULES,
    FaultLabels,
    ProtectionGrid,
    ProtectionSettings,
    RehearsalTrace,
    Trip,
    hold_readings,
    pareto_front,
    rehearse,
    sweep,
)


def trace(
    current_a: Sequence[Sequence[float]],
    *,
    temp_c: Sequence[Sequence[float]] | None = None,
    vin_v: Sequence[float] | None = None,
    active: Sequence[Sequence[bool]] | None = None,
    t_s: Sequence[float] | None = None,
) -> RehearsalTrace:
    """Defaults: one sample per second, 50 degC everywhere, 12 V in, every phase present."""
    n, n_phases = len(current_a), len(current_a[0])
    return RehearsalTrace(
        np.arange(float(n)) if t_s is None else t_s,
        current_a,
        np.full((n, n_phases), 50.0) if temp_c is None else temp_c,
        np.full(n, 12.0) if vin_v is None else vin_v,
        active,
    )


def summary(trips: list[Trip]) -> list[tuple[int, int, str]]:
    return [(x.sample, x.phase, x.rule) for x in trips]


# Phase 0 over 20 A on samples 1..3 and 5..8 (one sample per second); phase 1 quiet.
OC = trace([[0, 5], [25, 5], [25, 5], [25, 5], [20, 5], [25, 5], [25, 5], [25, 5], [25, 5], [0, 5]])


# --- one rule at a time --------------------------------------------------------------------


@pytest.mark.parametrize(
    ("debounce_s", "samples"),
    [
        (0.0, [1, 5]),  # first true sample of each run; 20 A is not over 20 A
        (2.0, [3, 7]),  # t_3 - t_1 = 2 >= 2 exactly; the second run trips once, not again at 8
        (2.5, [8]),  # the first run lasts only 2 s
        (3.0, [8]),  # t_8 - t_5 = 3
        (3.5, []),
    ],
)
def test_over_current_debounce(debounce_s: float, samples: list[int]) -> None:
    got = rehearse(OC, ProtectionSettings(oc_level_a=20.0, oc_debounce_s=debounce_s))
    assert summary(got) == [(k, 0, "over_current") for k in samples]
    assert all(x.value == 25.0 for x in got)


def test_debounce_counts_time_not_samples() -> None:
    tr = trace([[25.0], [25.0], [25.0], [25.0]], t_s=[0.0, 0.5, 3.0, 3.2])
    got = rehearse(tr, ProtectionSettings(oc_level_a=20.0, oc_debounce_s=1.0))
    assert [(x.sample, x.time_s) for x in got] == [(2, 3.0)]


def test_a_rule_re_arms_only_when_the_condition_clears() -> None:
    tr = trace([[25.0], [26.0], [27.0], [19.0], [25.0]])
    got = rehearse(tr, ProtectionSettings(oc_level_a=20.0))
    assert summary(got) == [(0, 0, "over_current"), (4, 0, "over_current")]


def test_over_temperature_no_reading_ends_a_run() -> None:
    temp = [[90.0], [90.0], [np.nan], [90.0], [90.0], [80.0]]
    tr = trace([[10.0]] * 6, temp_c=temp)
    got = rehearse(tr, ProtectionSettings(ot_level_c=85.0, ot_debounce_s=1.0))
    # run 0..1 trips at 1; NaN clears; run 3..4 trips at 4
    assert summary(got) == [(1, 0, "over_temperature"), (4, 0, "over_temperature")]
    assert got[0].value == 90.0
    all_nan = trace([[10.0]] * 3, temp_c=[[np.nan]] * 3)
    assert rehearse(all_nan, ProtectionSettings(ot_level_c=-273.0)) == []


def test_imbalance_share_of_the_present_phases() -> None:
    # (10, 10): equal; (15, 5): mean 10, both phases 50 % off; (11, 9): 10 % off
    tr = trace([[10.0, 10.0], [15.0, 5.0], [11.0, 9.0]])
    got = rehearse(tr, ProtectionSettings(imbalance_pct=40.0))
    assert summary(got) == [(1, 0, "imbalance"), (1, 1, "imbalance")]
    assert [x.value for x in got] == [50.0, 50.0]
    # the rail carries 20 A, not more than a 20 A minimum load: not watched
    assert rehearse(tr, ProtectionSettings(imbalance_pct=40.0, imbalance_min_load_a=20.0)) == []
    # phase 2 reported absent: (12, 8, 0) is 20 % off for the two present phases only
    absent = trace([[12.0, 8.0, 0.0]], active=[[True, True, False]])
    got = rehearse(absent, ProtectionSettings(imbalance_pct=15.0))
    assert summary(got) == [(0, 0, "imbalance"), (0, 1, "imbalance")]
    assert [round(x.value, 9) for x in got] == [20.0, 20.0]


def test_dead_phase_needs_the_others_to_carry_load() -> None:
    rows = [[10.0, 10.0, 0.5], [10.0, 10.0, 0.5], [4.0, 4.0, 0.5], [10.0, 10.0, 3.0]]
    tr = trace(rows)
    got = rehearse(tr, ProtectionSettings(dead_floor_a=1.0, dead_others_min_a=5.0))
    # others' mean 10 A > 5 A on samples 0..1 only; 3 A is not below the 1 A floor
    assert summary(got) == [(0, 2, "dead_phase")]
    assert got[0].value == 0.5
    got = rehearse(
        tr, ProtectionSettings(dead_floor_a=1.0, dead_debounce_s=1.0, dead_others_min_a=3.0)
    )
    assert summary(got) == [(1, 2, "dead_phase")]  # held from 0 through 2, trips at t = 1
    absent = trace(rows, active=[[True, True, False]] * 4)  # an isolated phase is not dead
    assert rehearse(absent, ProtectionSettings(dead_floor_a=1.0)) == []


def test_under_voltage_is_a_rail_trip() -> None:
    tr = trace([[10.0]] * 5, vin_v=[12.0, 11.0, 11.0, np.nan, 11.0])
    got = rehearse(tr, ProtectionSettings(uv_level_v=11.5))
    assert summary(got) == [(1, -1, "under_voltage"), (4, -1, "under_voltage")]
    assert got[0].value == 11.0


@pytest.mark.parametrize("level", [np.nan, np.inf, -np.inf])
def test_a_non_finite_level_disables_the_rule(level: float) -> None:
    everything = ProtectionSettings(
        oc_level_a=level,
        ot_level_c=level,
        imbalance_pct=level,
        dead_floor_a=level,
        uv_level_v=level,
    )
    tr = trace([[100.0, 0.0]] * 3, temp_c=[[200.0, 200.0]] * 3, vin_v=[0.0] * 3)
    assert rehearse(tr, everything) == []


# --- load-step blanking --------------------------------------------------------------------

# Phase 0 over 20 A on samples 2..5; phase 1 steps from 5 A to 19 A at sample 2 (rail +34 A).
STEP = trace(
    [[5, 5], [5, 5], [25, 19], [25, 19], [25, 19], [25, 19], [5, 19]],
    temp_c=[[50.0, 50.0]] * 2 + [[99.0, 50.0]] + [[50.0, 50.0]] * 4,
)


def test_blanking_after_a_load_step() -> None:
    base = ProtectionSettings(oc_level_a=20.0, ot_level_c=90.0, step_a=30.0)
    assert summary(rehearse(STEP, base)) == [(2, 0, "over_current"), (2, 0, "over_temperature")]
    # samples 2 and 3 are blanked (t - 2 < 1.5): over-current waits until sample 4;
    # over-temperature is never blanked
    got = rehearse(
        STEP, ProtectionSettings(oc_level_a=20.0, ot_level_c=90.0, step_a=30.0, blanking_s=1.5)
    )
    assert summary(got) == [(2, 0, "over_temperature"), (4, 0, "over_current")]
    # 2 s of blanking ends at t = 4 exactly (t - t_step < blanking_s is strict)
    got = rehearse(STEP, ProtectionSettings(oc_level_a=20.0, step_a=30.0, blanking_s=2.0))
    assert summary(got) == [(4, 0, "over_current")]


@pytest.mark.parametrize("step_a", [34.0, np.inf, np.nan])
def test_no_blanking_without_a_step_over_step_a(step_a: float) -> None:
    got = rehearse(STEP, ProtectionSettings(oc_level_a=20.0, step_a=step_a, blanking_s=1.5))
    assert summary(got) == [(2, 0, "over_current")]  # the rail moved by exactly 34 A


def test_blanking_can_split_a_run_into_two_trips() -> None:
    # phase 0 over 20 A throughout; phase 1 steps by 13 A at sample 3, blanking just that sample
    tr = trace([[25, 5]] * 3 + [[25, 18]] * 3)
    assert len(rehearse(tr, ProtectionSettings(oc_level_a=20.0))) == 1
    got = rehearse(tr, ProtectionSettings(oc_level_a=20.0, step_a=10.0, blanking_s=0.5))
    assert summary(got) == [(0, 0, "over_current"), (4, 0, "over_current")]


# --- what is and is not monotone -----------------------------------------------------------


def test_raising_a_level_can_add_trips() -> None:
    """Not monotone: a higher level can split one run into two (25, 21, 25 A)."""
    tr = trace([[25.0], [21.0], [25.0]])
    assert len(rehearse(tr, ProtectionSettings(oc_level_a=20.0))) == 1
    assert len(rehearse(tr, ProtectionSettings(oc_level_a=22.0))) == 2


def random_trace(seed: int) -> RehearsalTrace:
    rng = np.random.default_rng(seed)
    n, p = 60, 3
    t = np.cumsum(rng.integers(1, 4, size=n)) * 0.25
    current = rng.normal(10.0, 4.0, size=(n, p))
    temp = rng.normal(70.0, 8.0, size=(n, p))
    temp[rng.random(temp.shape) < 0.1] = np.nan
    vin = rng.normal(12.0, 0.4, size=n)
    return RehearsalTrace(t, current, temp, vin, rng.random((n, p)) < 0.9)


def first_trips(tr: RehearsalTrace, s: ProtectionSettings) -> dict[tuple[int, str], float]:
    out: dict[tuple[int, str], float] = {}
    for x in rehearse(tr, s):
        out.setdefault((x.phase, x.rule), x.time_s)
    return out


# (setting, change that makes it stricter)
STRICTER = [
    ("oc_level_a", 3.0),
    ("ot_level_c", 5.0),
    ("imbalance_pct", 20.0),
    ("dead_floor_a", -3.0),
    ("uv_level_v", -0.4),
    ("blanking_s", 0.75),
    ("imbalance_min_load_a", 28.0),
    ("dead_others_min_a", 9.0),
]
LOOSE = ProtectionSettings(
    oc_level_a=14.0,
    ot_level_c=75.0,
    imbalance_pct=30.0,
    dead_floor_a=6.0,
    uv_level_v=11.8,
    step_a=6.0,
)


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    d1=st.sampled_from([0.0, 0.25, 0.5, 1.0]),
    extra=st.sampled_from([0.0, 0.25, 0.6, 2.0]),
    blanking_s=st.sampled_from([0.0, 0.5]),
)
def test_longer_debounce_never_adds_trips(
    seed: int, d1: float, extra: float, blanking_s: float
) -> None:
    """True for every rule: the runs of the condition do not depend on the debounce, and each
    run trips at most once, later or not at all when the debounce grows."""
    names = (
        "oc_debounce_s",
        "ot_debounce_s",
        "imbalance_debounce_s",
        "dead_debounce_s",
        "uv_debounce_s",
    )
    base = {**LOOSE.__dict__, "blanking_s": blanking_s}
    grid = ProtectionGrid.from_settings(
        [
            ProtectionSettings(**{**base, **dict.fromkeys(names, d1)}),
            ProtectionSettings(**{**base, **dict.fromkeys(names, d1 + extra)}),
        ]
    )
    res = sweep(random_trace(seed), grid)
    assert np.all(res.trips_by_rule[1] <= res.trips_by_rule[0])


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    change=st.sampled_from(STRICTER),
    debounce_s=st.sampled_from([0.0, 0.5]),
)
def test_a_stricter_setting_never_trips_earlier(
    seed: int, change: tuple[str, float], debounce_s: float
) -> None:
    """The held set only shrinks when a level gets stricter, blanking longer or a minimum
    load higher, so no rule on any phase trips first earlier (its trip count may still rise,
    see test_raising_a_level_can_add_trips)."""
    name, delta = change
    loose = ProtectionSettings(
        **{**LOOSE.__dict__, "oc_debounce_s": debounce_s, "dead_debounce_s": debounce_s}
    )
    strict = ProtectionSettings(**{**loose.__dict__, name: getattr(loose, name) + delta})
    tr = random_trace(seed)
    before, after = first_trips(tr, loose), first_trips(tr, strict)
    assert set(after) <= set(before)
    assert all(after[key] >= before[key] for key in after)


# --- sweep scoring -------------------------------------------------------------------------


def test_sweep_counts_match_rehearse_per_combination() -> None:
    grid = ProtectionGrid.product({"oc_level_a": [15.0, 20.0, 24.0], "oc_debounce_s": [0.0, 2.0]})
    res = sweep(OC, grid)
    want = [len(rehearse(OC, grid.settings(c))) for c in range(grid.size)]
    assert res.trips.tolist() == want == [1, 1, 2, 2, 2, 2]  # 20 A is over 15 A
    assert res.trips_by_rule[:, RULES.index("over_current")].tolist() == want
    assert res.false_trips.tolist() == want  # no labels: every trip is false
    assert res.latency_s.shape == (6, 0)
    assert np.all(np.isnan(res.mean_latency_s))
    assert np.all(np.isnan(res.max_latency_s))


def test_latency_false_trips_and_rail_labels() -> None:
    labels = FaultLabels(
        start_s=[4.5, 0.0, 6.0],
        end_s=[8.0, 2.0, 6.0],
        phase=[0, 1, -1],
        kind=["any", "any", "under_voltage"],
    )
    tr = trace(
        [row[:2] for row in OC.current_a.tolist()], vin_v=[12.0] * 6 + [11.0, 11.0, 12.0, 11.0]
    )
    grid = ProtectionGrid(
        {"oc_level_a": [20.0, 20.0], "oc_debounce_s": [0.0, 3.0], "uv_level_v": 11.5}
    )
    res = sweep(tr, grid, labels)
    # debounce 0: over-current trips at 1 (false) and 5 (label 0, 0.5 s late); under-voltage
    # at 6 (label 2, on time) and 9 (false: no label covers t = 9)
    # debounce 3: over-current trips at 8 only (label 0, 3.5 s late)
    assert res.trips.tolist() == [4, 3]
    assert res.false_trips.tolist() == [2, 1]
    np.testing.assert_array_equal(res.latency_s, [[0.5, np.nan, 0.0], [3.5, np.nan, 0.0]])
    assert res.missed.tolist() == [1, 1]
    assert res.mean_latency_s.tolist() == [0.25, 1.75]
    assert np.all(np.isnan(res.max_latency_s))  # label 1 is missed by both


def test_a_rule_held_when_the_window_opens_detects_nothing_new() -> None:
    # phase 0 over 20 A from sample 1 to 8: it tripped at 1, before the window [3, 6]
    labels = FaultLabels([3.0], [6.0], [0], ["any"])
    tr = trace([[0.0]] + [[25.0]] * 8 + [[0.0]])
    res = sweep(tr, ProtectionGrid({"oc_level_a": [20.0]}), labels)
    assert res.missed.tolist() == [1]
    assert res.false_trips.tolist() == [1]
    # dropping to the level inside the window re-arms it: trips again at sample 5
    tr = trace([[0.0]] + [[25.0]] * 3 + [[20.0]] + [[25.0]] * 4 + [[0.0]])
    res = sweep(tr, ProtectionGrid({"oc_level_a": [20.0]}), labels)
    assert res.latency_s.tolist() == [[2.0]]


def test_a_kind_naming_a_rule_counts_only_that_rule() -> None:
    tr = trace([[25.0]] * 3, temp_c=[[50.0], [99.0], [99.0]])
    grid = ProtectionGrid({"oc_level_a": [20.0], "ot_level_c": [90.0]})
    for kind, latency in (
        ("any", 0.0),
        ("over_current", 0.0),
        ("over_temperature", 1.0),
        ("dead_phase", np.nan),
    ):
        res = sweep(tr, grid, FaultLabels([0.0], [2.0], [0], [kind]))
        np.testing.assert_array_equal(res.latency_s, [[latency]])


# --- Pareto front --------------------------------------------------------------------------


@settings(max_examples=60, deadline=None)
@given(
    points=st.lists(
        st.tuples(st.integers(0, 4), st.sampled_from([0.1, 0.2, 0.5, 1.0, np.nan])),
        min_size=1,
        max_size=30,
    )
)
def test_pareto_front_keeps_exactly_the_undominated(points: list[tuple[int, float]]) -> None:
    f = np.array([p[0] for p in points], dtype=np.float64)
    lat = np.array([p[1] for p in points])
    worst = np.where(np.isnan(lat), np.inf, lat)
    front = pareto_front(f, lat)
    for i in range(f.size):
        dominated = np.any((f <= f[i]) & (worst <= worst[i]) & ((f < f[i]) | (worst < worst[i])))
        assert (i in front.tolist()) == (not dominated)
    keys = [(f[i], worst[i], i) for i in front]
    assert keys == sorted(keys)


# --- validation ----------------------------------------------------------------------------


def test_validation_names_the_argument() -> None:
    one = np.ones((2, 1))
    with pytest.raises(ValueError, match="t_s"):
        RehearsalTrace(np.array([1.0, 1.0]), one, one, np.ones(2))
    with pytest.raises(ValueError, match="current_a"):
        RehearsalTrace(np.arange(2.0), np.array([[np.nan], [1.0]]), one, np.ones(2))
    with pytest.raises(ValueError, match="temp_c"):
        RehearsalTrace(np.arange(2.0), one, np.full((2, 1), np.inf), np.ones(2))
    with pytest.raises(ValueError, match="vin_v"):
        RehearsalTrace(np.arange(2.0), one, one, np.ones(3))
    with pytest.raises(ValueError, match="active"):
        RehearsalTrace(np.arange(2.0), one, one, np.ones(2), np.ones((2, 1)))
    with pytest.raises(ValueError, match="oc_debounce_s"):
        ProtectionGrid({"oc_debounce_s": [-1.0]})
    with pytest.raises(ValueError, match="blanking_s"):
        ProtectionGrid({"blanking_s": [np.nan]})
    with pytest.raises(ValueError, match="step_a"):
        ProtectionGrid({"step_a": [-1.0]})
    with pytest.raises(ValueError, match="dead_others_min_a"):
        ProtectionGrid({"dead_others_min_a": [np.inf]})
    with pytest.raises(ValueError, match="oc_levle_a"):
        ProtectionGrid({"oc_levle_a": [1.0]})
    with pytest.raises(ValueError, match="same length"):
        ProtectionGrid({"oc_level_a": [1.0, 2.0], "ot_level_c": [1.0, 2.0, 3.0]})
    with pytest.raises(ValueError, match="end_s"):
        FaultLabels([2.0], [1.0], [0], ["any"])
    with pytest.raises(ValueError, match="kind"):
        FaultLabels([1.0], [2.0], [0], [])
    with pytest.raises(ValueError, match=r"labels\.phase"):
        sweep(OC, ProtectionGrid({}), FaultLabels([1.0], [2.0], [2], ["any"]))
    with pytest.raises(ValueError, match="latency_s"):
        pareto_front([1, 2], [0.1])


def test_grid_shapes() -> None:
    grid = ProtectionGrid({"oc_level_a": [10.0, 20.0, 30.0], "ot_level_c": 90.0})
    assert grid.size == 3
    assert all(col.shape == (3,) for col in grid.columns.values())
    np.testing.assert_equal(
        asdict(grid.settings(2)), asdict(ProtectionSettings(oc_level_a=30.0, ot_level_c=90.0))
    )
    assert ProtectionGrid({}).size == 1
    settings_list = [ProtectionSettings(uv_level_v=v) for v in (11.0, 11.5)]
    np.testing.assert_equal(
        asdict(ProtectionGrid.from_settings(settings_list).settings(1)), asdict(settings_list[1])
    )


# --- hysteresis, missing readings, label kinds (issue 18) -----------------------------------


def test_a_release_level_stops_a_noisy_crossing_from_tripping_again() -> None:
    """A temperature hovering around 100 degC with 1 K of noise crosses the level six times;
    with a release level of 95 degC the rule trips once and re-arms only after cooling."""
    temps = [99.0, 101.0, 99.5, 100.5, 99.0, 101.0, 99.8, 100.2, 99.1, 100.9, 99.6, 100.4, 94.0,
             101.0]  # fmt: skip
    tr = trace([[10.0]] * len(temps), temp_c=[[x] for x in temps])
    plain = rehearse(tr, ProtectionSettings(ot_level_c=100.0))
    held = rehearse(tr, ProtectionSettings(ot_level_c=100.0, ot_release_c=95.0))
    assert [x.sample for x in plain] == [1, 3, 5, 7, 9, 11, 13]
    assert [x.sample for x in held] == [1, 13]  # released at sample 12 (94 degC)
    grid = ProtectionGrid({"ot_level_c": 100.0, "ot_release_c": [np.nan, 95.0, 105.0]})
    # a release level on the tripping side means no hysteresis
    assert sweep(tr, grid).trips.tolist() == [7, 2, 7]


def test_release_for_a_falling_quantity_is_above_the_level() -> None:
    vin = [12.0, 10.9, 11.05, 10.95, 11.05, 11.6, 10.9]
    tr = trace([[10.0]] * len(vin), vin_v=vin)
    assert [x.sample for x in rehearse(tr, ProtectionSettings(uv_level_v=11.0))] == [1, 3, 6]
    got = rehearse(tr, ProtectionSettings(uv_level_v=11.0, uv_release_v=11.5))
    assert [x.sample for x in got] == [1, 6]


def test_a_missing_reading_holds_for_a_bounded_time_or_clears() -> None:
    """Temperature read every other sample, held 20 K above the level (issue 18, item 3):
    clearing on every gap re-arms the rule and no run ever lasts the debounce; holding the
    last reading keeps the condition true, as firmware would."""
    n = 20
    temps = [[120.0] if k % 2 == 0 else [np.nan] for k in range(n)]
    tr = trace([[10.0]] * n, temp_c=temps, t_s=np.arange(n) * 1e-3)
    settings_ = ProtectionSettings(ot_level_c=100.0, ot_debounce_s=0.01)
    assert rehearse(tr, settings_) == []  # clear: every gap ends the run
    assert [x.sample for x in rehearse(hold_readings(tr, 0.0015), settings_)] == [10]
    # a hold shorter than the gap clears as before
    assert rehearse(hold_readings(tr, 0.0005), settings_) == []


def test_hold_readings_refuses_a_negative_hold() -> None:
    with pytest.raises(ValueError, match="hold_s"):
        hold_readings(OC, -1.0)


@pytest.mark.parametrize(
    ("kind", "phase", "match"),
    [
        ("overcurrent", 0, "not 'any'"),  # a typo no longer means "any rule"
        ("fault", 0, "not 'any'"),
        ("under_voltage", 1, "never trips on phase 1"),
        ("over_current", -1, "never trips on phase -1"),
    ],
)
def test_label_kinds_are_checked(kind: str, phase: int, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        FaultLabels([1.0], [2.0], [phase], [kind])


def test_times_run_on_integer_ticks() -> None:
    tr = trace([[1.0]] * 3, t_s=[1_764_700_000.0, 1_764_700_000.001, 1_764_700_000.002])
    assert tr.quantum_ns == 1000
    assert np.diff(tr.t_ns).tolist() == [1_000_000, 1_000_000]
    with pytest.raises(ValueError, match="strictly increasing"):
        trace([[1.0]] * 2, t_s=[1_764_700_000.0, 1_764_700_000.0000001])
