"""The sync client against the real service: rails, samples, status, events, analyses."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta, timezone

import httpx
import pytest

from phaseward_client import (
    BreakerParams,
    Client,
    Event,
    FosterStage,
    Load,
    PhaseDrop,
    PhaseReading,
    PhasewardError,
    Sample,
    SoaPoint,
)
from support import T0, free_port, new_rail_id, rail_definition, sample

EVEN = [20.0, 20.0, 20.0, 20.0]


def test_health(client: Client) -> None:
    assert client.health()["status"] == "ok"


def test_rail_create_get_list_put_delete(client: Client) -> None:
    rid = new_rail_id()
    created = client.create_rail(rail_definition(rid))
    assert (created.id, created.version) == (rid, 1)
    assert created.spec["phase_count"] == 4
    assert created.spec["monitor"]["debounce_samples"] == 2
    assert client.get_rail(rid) == created

    listed = {r.id for r in client.iter_rails(page_size=2)}
    assert rid in listed
    assert len(listed) == len(client.list_rails(limit=1000))

    updated = client.put_rail(rid, rail_definition(rid, load_a=80.0))
    assert (updated.version, updated.spec["load_a"]) == (2, 80.0)
    with pytest.raises(ValueError, match="is not the rail"):
        client.put_rail(rid, rail_definition("other"))

    client.delete_rail(rid)
    with pytest.raises(PhasewardError) as gone:
        client.get_rail(rid)
    assert (gone.value.status, gone.value.error) == (404, "not_found")


def test_an_unusual_definition_comes_back_with_warnings(client: Client) -> None:
    created = client.create_rail(rail_definition(new_rail_id(), load_a=130.0))
    assert [(w.field, w.rule) for w in created.warnings] == [("load_a", "load_above_ratings")]
    assert client.get_rail(created.id).warnings == []


def test_refusals_carry_status_error_detail_field(client: Client, rail_id: str) -> None:
    with pytest.raises(PhasewardError) as taken:
        client.create_rail(rail_definition(rail_id))
    assert (taken.value.status, taken.value.error, taken.value.field) == (409, "conflict", "id")
    assert rail_id in taken.value.detail

    with pytest.raises(PhasewardError) as invalid:
        client.create_rail(rail_definition(new_rail_id(), vout_v=13.0))
    err = invalid.value
    assert (err.status, err.error, err.field) == (422, "invalid_input", "vout_v")
    assert err.errors
    assert err.errors[0]["field"] == "vout_v"
    assert "422 invalid_input" in str(err)


def test_post_one_and_a_batch_then_read_them_back(client: Client, rail_id: str) -> None:
    one = client.post_sample(rail_id, sample(0, EVEN))
    assert (one.stored, one.duplicates, one.condition) == (1, 0, "nominal")
    batch = client.post_samples(rail_id, [sample(k, EVEN) for k in (1, 2, 3)])
    assert (batch.stored, batch.duplicates) == (3, 0)
    again = client.post_samples(rail_id, [sample(k, EVEN) for k in (2, 3)])
    assert (again.stored, again.duplicates) == (0, 2)

    window = client.get_samples(rail_id, since=0, until=1e10)
    assert window.seq == [0, 1, 2, 3]
    assert window.time_s == [T0 + k for k in range(4)]
    assert window.current_a[0] == [20.0, 20.0, 20.0, 20.0]
    assert not window.truncated


def test_typed_sample_with_aware_datetime_and_flags(client: Client, rail_id: str) -> None:
    when = datetime(2027, 3, 4, 10, 15, tzinfo=timezone(timedelta(hours=1)))
    reading = [PhaseReading(index=i, current_a=15.0, temp_c=50.0) for i in range(4)]
    client.post_sample(rail_id, Sample(time=when, seq=7, vin_v=12.0, vout_v=1.0, phases=reading))
    tripped = [*reading[:2], PhaseReading(index=2, current_a=0.0, breaker_tripped=True), reading[3]]
    result = client.post_sample(
        rail_id, Sample(time=when + timedelta(seconds=1), seq=8, vin_v=12, vout_v=1, phases=tripped)
    )
    assert result.condition == "degraded"
    window = client.get_samples(rail_id, since=0, until=1e10)
    assert window.time_s[0] == when.timestamp()
    assert window.flags[1][2] != 0
    assert window.flags[1][0] == 0


def test_typed_sample_with_pmbus_words(client: Client, rail_id: str) -> None:
    """READ_VIN 0xD300 = 12.0 V, READ_IIN 0xC8C0 = 1.5 A, READ_TEMPERATURE_1 0xE2A4 = 42.25
    degC (LINEAR11, worked in tests/reference/test_ref_pmbus_telemetry.py)."""
    reading = [
        PhaseReading(index=i, current_a=15.0, read_vin=0xD300, read_iin=0xC8C0,
                     read_temperature_1=0xE2A4, status_iout=0x80 if i == 3 else None)
        for i in range(4)
    ]  # fmt: skip
    client.post_sample(rail_id, Sample(time=T0, seq=0, vin_v=None, vout_v=1.0, phases=reading))
    window = client.get_samples(rail_id, since=0, until=1e10)
    assert (window.vin_v, window.iin_a) == ([12.0], [6.0])
    assert window.temp_c[0] == [42.25] * 4
    assert window.flags[0][3] != 0


def test_client_refuses_what_json_cannot_carry(client: Client, rail_id: str) -> None:
    with pytest.raises(ValueError, match="finite"):
        client.post_sample(rail_id, Sample(1.8e9, 12, 1, [PhaseReading(0, current_a=math.nan)], 0))
    with pytest.raises(ValueError, match="timezone"):
        client.post_sample(rail_id, Sample(datetime(2027, 1, 1), 12, 1, [PhaseReading(0, 1.0)], 0))  # noqa: DTZ001
    with pytest.raises(ValueError, match="exactly one"):
        PhaseReading(0, current_a=1.0, sense_v=0.001).to_json()
    with pytest.raises(ValueError, match="cannot send"):
        client.post_sample(rail_id, {**sample(0, EVEN), "vin_v": math.inf})
    assert client.get_samples(rail_id, since=0, until=1e10).count == 0


def test_a_bad_item_refuses_the_whole_batch_naming_its_field(client: Client, rail_id: str) -> None:
    bad = [sample(k, EVEN) for k in range(3)]
    bad[1]["phases"][2]["temp_c"] = -500.0
    with pytest.raises(PhasewardError) as refused:
        client.post_samples(rail_id, bad)
    assert (refused.value.status, refused.value.field) == (422, "[1].phases[2].temp_c")
    assert client.get_samples(rail_id, since=0, until=1e10).count == 0
    rejected = client.list_events(rail_id, kind=["telemetry.rejected"]).items
    assert len(rejected) == 1


def test_status_is_typed(client: Client, rail_id: str) -> None:
    before = client.status(rail_id)
    assert before.condition is None
    assert before.last_sample is None
    client.post_samples(rail_id, [sample(k, [15.0] * 4) for k in range(3)])
    status = client.status(rail_id)
    assert status.condition == "nominal"
    assert status.capacity is not None
    assert status.capacity.capacity_a == pytest.approx(120.0, rel=1e-5)
    assert status.last_sample is not None
    assert status.last_sample.seq == 2
    assert [p.condition for p in status.phases] == ["active"] * 4
    assert status.thermal is not None
    assert len(status.thermal.estimated_junction_c) == 4
    assert status.screening is not None
    assert status.screening.n1_secure
    assert "monitoring aid" in status.caution


def _trip_phase_1(client: Client, rail_id: str) -> None:
    client.post_samples(rail_id, [sample(k, EVEN) for k in range(3)])
    client.post_sample(rail_id, sample(3, [20.0, 0.0, 20.0, 20.0], tripped=1))


def test_events_filter_page_and_ack(client: Client, rail_id: str) -> None:
    _trip_phase_1(client, rail_id)
    everything = client.list_events(rail_id, limit=1000).items
    kinds = [(e.kind, e.phase) for e in reversed(everything)]
    assert kinds == [("rail.condition", None), ("phase.isolated", 1), ("rail.condition", None)]
    assert everything[0].details["to"] == "degraded"

    paged = list(client.iter_events(rail_id, page_size=1))
    assert [e.id for e in paged] == [e.id for e in everything]
    newer = list(client.iter_events(rail_id, after_id=everything[-1].id))
    assert [e.id for e in newer] == [e.id for e in everything[:-1]]

    isolated = client.list_events(rail_id, kind=["phase.isolated"], phase=1).items
    assert [e.kind for e in isolated] == ["phase.isolated"]
    assert client.list_events(rail_id, kind=["phase.isolated"], phase=2).items == []
    critical = client.list_events(rail_id, severity=["critical"]).items
    assert [e.kind for e in critical] == ["phase.isolated"]
    warnings = client.list_events(rail_id, severity=["warning"], since=T0 + 3, until=T0 + 4)
    assert [e.details["to"] for e in warnings.items] == ["degraded"]
    assert client.list_events(rail_id, severity=["info", "warning"], until=T0 + 3).items == [
        everything[-1]
    ]
    since_dt = client.list_events(rail_id, since=datetime.fromtimestamp(T0 + 3, tz=UTC))
    assert len(since_dt.items) == 2
    assert any(e.rail_id == rail_id for e in client.list_events(None, limit=1000).items)

    acked = client.ack_event(isolated[0].id, by="bench operator", note="stage replaced")
    assert isinstance(acked, Event)
    assert (acked.acked_by, acked.ack_note) == ("bench operator", "stage replaced")
    assert acked.acked_key is not None
    assert acked.acked_at is not None
    with pytest.raises(PhasewardError) as twice:
        client.ack_event(isolated[0].id, by="someone else")
    assert (twice.value.status, twice.value.error) == (409, "conflict")
    with pytest.raises(PhasewardError) as bad:
        client.list_events(rail_id, severity=["loud"])
    assert bad.value.field == "severity"


def test_screening_forecast(client: Client, rail_id: str) -> None:
    client.post_samples(rail_id, [sample(k, EVEN) for k in range(3)])
    pairs = client.screening(rail_id, depth=2)
    assert pairs.depth == 2
    assert sorted(c.lose_phases for c in pairs.cases) == [
        [0, 1], [0, 2], [0, 3], [1, 2], [1, 3], [2, 3],
    ]  # fmt: skip
    assert pairs.load_a == pytest.approx(80.0)
    assert not pairs.secure  # two 30 A phases left cannot carry 80 A
    assert len(pairs.overloading) == 6
    assert pairs.cases[0].capacity_a == pytest.approx(60.0, rel=1e-5)
    singles = client.screening(rail_id)
    assert singles.secure
    assert len(singles.cases) == 4

    fc = client.forecast(
        rail_id, load=Load.stepwise((0, 60.0), (600, 85.0)), drop=[PhaseDrop(phase=3, at_s=300)],
        horizon_s=1800, points=50,
    )  # fmt: skip
    assert len(fc.time_s) == 50
    assert len(fc.junction_c[0]) == 4
    assert fc.load_a[0] == pytest.approx(60.0)
    assert fc.load_a[-1] == pytest.approx(85.0)
    assert fc.peak is not None
    with pytest.raises(PhasewardError) as out_of_range:
        client.forecast(rail_id, drop=[PhaseDrop(phase=9)])
    assert out_of_range.value.field == "drop[0].phase"
    constant = client.forecast(rail_id, load=Load.constant(40.0), horizon_s=600, points=10)
    assert constant.load_a == [40.0] * 10
    assert constant.verdict == "holds"
    rated = client.ratings(rail_id, durations_s=[30.0], pairs=True)
    assert rated.durations_s == [30.0, None]
    assert len(rated.cases) == 1 + 4 + 6
    assert rated.cases[0].lose_phases == []
    assert rated.cases[0].ratings[0].binding in ("rating", "warning_line")
    assert rated.cases[0].ratings[1].rating_a <= rated.cases[0].ratings[0].rating_a


def test_reliability_needs_its_section(client: Client, rail_id: str) -> None:
    client.post_samples(rail_id, [sample(k, EVEN) for k in range(3)])
    with pytest.raises(PhasewardError) as missing:
        client.reliability(rail_id, hours=43800)
    assert missing.value.status == 409
    client.put_rail(
        rail_id,
        rail_definition(rail_id, reliability={"fit_at_ref": 50.0, "ref_c": 55.0}),
    )
    client.post_samples(rail_id, [sample(k, EVEN) for k in range(3, 6)])
    answer = client.reliability(rail_id, hours=43800)
    assert answer.hours == 43800
    assert answer.version == 2
    assert 0.0 < answer.present.survival_probability <= 1.0
    assert [c.lose_phase for c in answer.n_minus_1] == [0, 1, 2, 3]


def test_breaker_stress(client: Client) -> None:
    params = BreakerParams(
        vin_v=12, current_limit_a=25, delay_s=0.004, junction_limit_c=150,
        foster=[FosterStage(0.4, 0.002), FosterStage(1.1, 0.05)],
        soa=[SoaPoint(0.001, 60), SoaPoint(0.01, 22)], curve_points=5,
    )  # fmt: skip
    answer = client.breaker_stress(params)
    assert answer.power_w == pytest.approx(12 * 25)
    assert answer.at_delay.delay_s == pytest.approx(0.004)
    assert len(answer.curve) == 5
    assert answer.longest_safe_delay_s > 0


def test_transport_errors_pass_through() -> None:
    with (
        Client(f"http://127.0.0.1:{free_port()}", timeout_s=2) as dead,
        pytest.raises(httpx.ConnectError),
    ):
        dead.health()


def test_api_key_goes_as_a_bearer_token() -> None:
    seen: list[str | None] = []

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request.headers.get("authorization"))
        return httpx.Response(200, json={"status": "ok", "version": "x"})

    with Client(
        "http://phaseward.test", api_key="pwk_abc", transport=httpx.MockTransport(handler)
    ) as c:
        c.health()
    assert seen == ["Bearer pwk_abc"]
