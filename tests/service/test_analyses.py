"""Screening and forecast through the API."""

from __future__ import annotations

from typing import Any

import httpx
import pytest
from tests.factories import SMALL_RAIL, sample

pytestmark = pytest.mark.anyio


@pytest.fixture
async def rail(client: httpx.AsyncClient) -> str:
    assert (await client.post("/v1/rails", json=SMALL_RAIL)).status_code == 201
    return "/v1/rails/bench-a"


async def feed(
    client: httpx.AsyncClient, rail: str, per_phase: float, n: int = 3, temps: float = 60.0
) -> None:
    body = [sample(k, [per_phase] * 4, temps=temps) for k in range(n)]
    assert (await client.post(f"{rail}/samples", json=body)).status_code == 200


async def test_single_and_pair_screening(client: httpx.AsyncClient, rail: str) -> None:
    await feed(client, rail, 16.0)
    one = (await client.get(f"{rail}/screening")).json()
    assert one["secure"] is True
    assert one["load_a"] == pytest.approx(64.0)
    assert sorted(c["lose_phases"][0] for c in one["cases"]) == [0, 1, 2, 3]
    # Equal sharing, current-bound: (N - 1) x 30 A and (N - 2) x 30 A (common practice).
    assert all(c["capacity_a"] == pytest.approx(90.0, rel=1e-5) for c in one["cases"])
    two = (await client.get(f"{rail}/screening", params={"depth": 2})).json()
    assert len(two["cases"]) == 6  # C(4, 2)
    assert all(c["capacity_a"] == pytest.approx(60.0, rel=1e-5) for c in two["cases"])
    assert two["secure"] is False  # 64 A is more than two phases carry
    assert len(two["overloading"]) == 6
    assert "monitoring aid" in two["caution"]


async def test_screening_names_the_losses_that_overload(
    client: httpx.AsyncClient, rail: str
) -> None:
    await feed(client, rail, 24.0)  # 96 A: more than any three phases can carry
    result = (await client.get(f"{rail}/screening")).json()
    assert result["secure"] is False
    assert sorted(result["overloading"]) == [[0], [1], [2], [3]]
    assert all(c["headroom_a"] == pytest.approx(-6.0, rel=1e-4) for c in result["cases"])


async def test_screening_without_telemetry_uses_the_rated_load(
    client: httpx.AsyncClient, rail: str
) -> None:
    result = (await client.get(f"{rail}/screening")).json()
    assert result["load_a"] == SMALL_RAIL["load_a"]
    assert result["secure"] is True  # 90 A fits on 3 x 30 A exactly, and thermally


@pytest.mark.parametrize(
    ("params", "code", "field"),
    [({"depth": 3}, 422, "depth"), ({"depth": "x"}, 422, "depth")],
)
async def test_screening_bad_depth(
    client: httpx.AsyncClient, rail: str, params: dict[str, Any], code: int, field: str
) -> None:
    answer = await client.get(f"{rail}/screening", params=params)
    assert answer.status_code == code
    assert answer.json()["field"] == field


async def test_forecast_keeps_the_peak_when_decimating(
    client: httpx.AsyncClient, rail: str
) -> None:
    await feed(client, rail, 10.0, temps=30.0)  # cool: the burst makes the peak
    burst = {"steps": [{"at_s": 0, "current_a": 40}, {"at_s": 100, "current_a": 119},
                       {"at_s": 130, "current_a": 40}]}  # fmt: skip
    fine = (await client.post(f"{rail}/forecast", json={"load": burst, "horizon_s": 600,
                                                         "points": 20000})).json()  # fmt: skip
    coarse = (await client.post(f"{rail}/forecast", json={"load": burst, "horizon_s": 600,
                                                           "points": 12})).json()  # fmt: skip
    assert len(coarse["time_s"]) <= 12
    hottest_fine = max(max(row) for row in fine["junction_c"])
    assert max(max(row) for row in coarse["junction_c"]) == pytest.approx(hottest_fine, abs=1e-9)
    assert coarse["peak"]["temp_c"] == pytest.approx(hottest_fine, abs=1e-9)
    assert 100 < coarse["peak"]["time_s"] <= 131


async def test_forecast_drop_and_limit(client: httpx.AsyncClient, rail: str) -> None:
    await feed(client, rail, 20.0)
    calm = (await client.post(f"{rail}/forecast", json={"horizon_s": 1800})).json()
    assert calm["time_to_warning_s"] is None
    assert calm["verdict"] == "holds"
    assert calm["runaway"] is False
    assert 0 < calm["margin_to_warning_k"] < calm["margin_to_limit_k"]
    # Lose two phases at t = 60 s with 80 A held: 40 A per survivor, past its rating and hot.
    hot = (await client.post(f"{rail}/forecast", json={
        "horizon_s": 1800, "drop": [{"phase": 1, "at_s": 60}, {"phase": 2, "at_s": 60}],
        "ambient_c": 70.0,
    })).json()  # fmt: skip
    assert hot["time_to_warning_s"] is not None
    assert hot["time_to_warning_s"] > 60
    assert hot["warning_phase"] in (0, 3)
    assert hot["margin_to_warning_k"] < 0
    assert [s["above_rating"] for s in hot["stretches"][:2]] == [[], [0, 3]]
    # A survivor reaches its junction limit and shuts down; the last one then carries 80 A,
    # past its 40 A trip current: the rail is down when the first junction reaches its limit.
    causes = [(c["phase"], c["cause"]) for c in hot["cascade"]]
    assert causes[:2] == [(1, "requested"), (2, "requested")]
    assert sorted(causes[2:], key=lambda c: c[1]) in (
        [(0, "junction_limit"), (3, "trip_current")], [(3, "junction_limit"), (0, "trip_current")],
    )  # fmt: skip
    assert hot["time_to_limit_s"] == hot["cascade"][2]["at_s"] > hot["time_to_warning_s"]
    assert hot["verdict"] == "down"
    assert hot["verdict_at_s"] == hot["time_to_limit_s"]


async def test_forecast_trip_cascade_to_down(client: httpx.AsyncClient, rail: str) -> None:
    """Regression: 190 A on 4 phases after a loss was "limit not reached"; a profile dropping
    every phase answered with junctions at ambient and no verdict."""
    await feed(client, rail, 20.0)
    # 150 A: one loss leaves 50 A per survivor, above the 40 A trip: all trip at 30 s.
    tripping = (await client.post(f"{rail}/forecast", json={
        "horizon_s": 600, "load": {"constant_a": 150}, "drop": [{"phase": 0, "at_s": 30}],
    })).json()  # fmt: skip
    assert tripping["verdict"] == "down"
    assert tripping["verdict_at_s"] == 30.0
    steps = tripping["cascade"]
    assert steps[0] == {"at_s": 30.0, "phase": 0, "cause": "requested", "current_a": None}
    assert {s["phase"] for s in steps[1:]} == {1, 2, 3}
    assert all(s["cause"] == "trip_current" and s["at_s"] == 30.0 for s in steps[1:])
    assert all(s["current_a"] > 40.0 for s in steps[1:])
    every = [{"phase": k, "at_s": 10.0} for k in range(4)]
    gone = (await client.post(f"{rail}/forecast", json={"horizon_s": 60, "drop": every})).json()
    assert gone["verdict"] == "down"
    assert gone["verdict_at_s"] == 10.0
    assert gone["verdict_cause"] == "no phase left to carry the load"


@pytest.mark.parametrize(
    ("body", "field"),
    [
        ({"drop": [{"phase": 9}]}, "drop[0].phase"),
        ({"horizon_s": 90000}, "horizon_s"),
        ({"load": {"constant_a": 10, "steps": [{"at_s": 0, "current_a": 1}]}}, "load"),
        ({"load": {"points": [{"at_s": 5, "current_a": 1}, {"at_s": 1, "current_a": 2}]}}, "load"),
        ({"points": 2}, "points"),
    ],
)
async def test_forecast_bad_input(
    client: httpx.AsyncClient, rail: str, body: dict[str, Any], field: str
) -> None:
    answer = await client.post(f"{rail}/forecast", json=body)
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field


async def test_ratings_table(client: httpx.AsyncClient, rail: str) -> None:
    await feed(client, rail, 20.0)
    table = (await client.get(f"{rail}/ratings")).json()
    assert table["durations_s"] == [60.0, 600.0, 3600.0, None]
    assert [c["lose_phases"] for c in table["cases"]] == [[], [0], [1], [2], [3]]
    assert "monitoring aid" in table["caution"]
    whole, single = table["cases"][0]["ratings"], table["cases"][1]["ratings"]
    # A short while the current rating binds (4 x 30 A, 3 x 30 A); given time, the heat does.
    assert whole[0]["rating_a"] == pytest.approx(120.0, rel=1e-9)
    assert whole[0]["binding"] == "rating"
    assert single[0]["rating_a"] == pytest.approx(90.0, rel=1e-9)
    for row in (whole, single):
        amps = [r["rating_a"] for r in row]
        assert amps == sorted(amps, reverse=True)  # longer never allows more
    assert single[0]["headroom_a"] == pytest.approx(90.0 - table["load_a"])
    status = (await client.get(f"{rail}/status")).json()
    assert whole[-1]["rating_a"] <= status["capacity"]["capacity_a"] * (1 + 1e-5)
    pairs = await client.get(f"{rail}/ratings", params={"pairs": True, "duration_s": [30, 5]})
    body = pairs.json()
    assert body["durations_s"] == [5.0, 30.0, None]
    assert len(body["cases"]) == 1 + 4 + 6


@pytest.mark.parametrize(
    ("params", "field"),
    [({"duration_s": -1}, "duration_s[0]"), ({"duration_s": "x"}, "duration_s[0]"),
     ({"pairs": "maybe"}, "pairs")],
)  # fmt: skip
async def test_ratings_bad_input(
    client: httpx.AsyncClient, rail: str, params: dict[str, Any], field: str
) -> None:
    answer = await client.get(f"{rail}/ratings", params=params)
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field


async def test_screening_shows_each_loss_cascade(client: httpx.AsyncClient, rail: str) -> None:
    # 36 A per phase: one loss leaves 48 A per survivor, past the 40 A trip: all trip at once.
    await feed(client, rail, 36.0)
    heavy = (await client.get(f"{rail}/screening")).json()
    for case in heavy["cases"]:
        assert case["down_at_s"] == 0.0
        assert [s["cause"] for s in case["cascade"]] == ["trip_current"] * 3
        assert sorted(s["phase"] for s in case["cascade"]) == sorted(
            set(range(4)) - set(case["lose_phases"])
        )
        assert case["overloads"] is True
    assert heavy["secure"] is False


async def test_screening_cascade_after_a_while(client: httpx.AsyncClient, rail: str) -> None:
    # 28 A per phase at 85 degC ambient: a loss leaves 37.3 A per survivor (below the trip);
    # a junction reaches its limit after a while, and then the rest go on current.
    hot = [sample(k, [28.0] * 4, temps=110.0, ambient_c=85.0) for k in range(3)]
    assert (await client.post(f"{rail}/samples", json=hot)).status_code == 200
    cases = (await client.get(f"{rail}/screening")).json()["cases"]
    first = cases[0]["cascade"]
    assert first[0]["cause"] == "junction_limit"
    assert first[0]["at_s"] > 0.0
    assert all(s["cause"] == "trip_current" for s in first[1:])
    assert cases[0]["down_at_s"] == pytest.approx(first[-1]["at_s"])
