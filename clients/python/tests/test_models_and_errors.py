"""Answer parsing and error bodies, without a service: shapes the client must refuse."""

from __future__ import annotations

import doctest
import random

import httpx
import pytest

import phaseward_client.errors
from phaseward_client import (
    DriftStatus,
    Event,
    EventPage,
    IngestResult,
    PhaseStatus,
    PhasewardError,
    RetryPolicy,
    UnexpectedResponse,
)

EVENT = {
    "id": 3, "rail_id": "r", "version": 1, "time": "2027-01-01T00:00:00+00:00",
    "time_s": 1.8e9, "kind": "phase.isolated", "severity": "critical", "phase": 2,
    "message": "m", "details": {"to": "isolated"}, "acked_by": None, "ack_note": None,
    "acked_at": None,
}  # fmt: skip


def test_doctests_of_the_errors_module() -> None:
    result = doctest.testmod(phaseward_client.errors)
    assert result.attempted >= 3
    assert result.failed == 0


def test_nested_models_and_unknown_keys() -> None:
    page = EventPage.from_json({"items": [EVENT, {**EVENT, "id": 2}], "next_cursor": "2",
                                "added_later": True})  # fmt: skip
    assert [e.id for e in page.items] == [3, 2]
    assert isinstance(page.items[0], Event)
    assert page.items[0].time_s == 1.8e9
    assert not page.items[0].cleared
    assert Event.from_json({**EVENT, "details": {"cleared": True}}).cleared


def test_ints_become_floats_but_not_the_other_way() -> None:
    assert Event.from_json({**EVENT, "time_s": 5}).time_s == 5.0
    with pytest.raises(UnexpectedResponse, match=r"Event\.id: expected int, got float"):
        Event.from_json({**EVENT, "id": 3.5})
    with pytest.raises(UnexpectedResponse, match="expected int, got bool"):
        IngestResult.from_json(
            {"stored": True, "duplicates": 0, "late": 0, "condition": None, "version": 1}
        )


def test_missing_or_null_fields_are_named() -> None:
    body = dict(EVENT)
    del body["kind"]
    with pytest.raises(UnexpectedResponse, match=r"Event\.kind: missing"):
        Event.from_json(body)
    with pytest.raises(UnexpectedResponse, match=r"Event\.kind: expected str, got NoneType"):
        Event.from_json({**EVENT, "kind": None})
    with pytest.raises(UnexpectedResponse, match=r"items\[1\]\.id"):
        EventPage.from_json({"items": [EVENT, {**EVENT, "id": "x"}], "next_cursor": None})
    with pytest.raises(UnexpectedResponse, match="expected an object"):
        Event.from_json([EVENT])


def test_error_body_becomes_one_exception() -> None:
    answer = httpx.Response(
        422,
        json={"error": "invalid_input", "detail": "bad", "field": "[0].seq",
              "errors": [{"field": "[0].seq", "detail": "bad"}]},
        headers={"retry-after": "7"},
    )  # fmt: skip
    err = PhasewardError.from_response(answer)
    assert (err.status, err.error, err.detail, err.field) == (
        422,
        "invalid_input",
        "bad",
        "[0].seq",
    )
    assert err.errors == [{"field": "[0].seq", "detail": "bad"}]
    assert err.retry_after_s == 7.0
    assert str(err) == "422 invalid_input: bad (field [0].seq)"


def test_a_body_that_is_not_ours_still_gives_status_and_text() -> None:
    err = PhasewardError.from_response(httpx.Response(502, text="<html>bad gateway</html>"))
    assert (err.status, err.error, err.field) == (502, "http_error", None)
    assert "bad gateway" in err.detail
    assert err.retry_after_s is None


def test_retry_policy() -> None:
    policy = RetryPolicy(base_delay_s=0.1, max_delay_s=1.0)
    rng = random.Random(4)
    busy = PhasewardError(503, "service_unavailable", "locked")
    assert policy.retryable(busy)
    assert policy.retryable(PhasewardError(429, "too_many", "slow down"))
    assert policy.retryable(httpx.ConnectError("refused"))
    assert not policy.retryable(PhasewardError(422, "invalid_input", "no"))
    assert not policy.retryable(PhasewardError(500, "internal_error", "bug"))
    for retry in range(12):
        cap = min(1.0, 0.1 * 2**retry)
        delays = [policy.delay_s(retry, busy, rng) for _ in range(200)]
        assert all(0.0 <= d <= cap for d in delays)
        assert max(delays) > 0.8 * cap  # full jitter spreads over the whole range
    told = PhasewardError(429, "too_many", "wait", retry_after_s=3.0)
    assert all(3.0 <= policy.delay_s(0, told, rng) <= 3.1 for _ in range(50))
    far = PhasewardError(429, "too_many", "wait", retry_after_s=1e6)
    assert policy.delay_s(0, far, rng) <= policy.max_retry_after_s + 0.1


def test_a_drift_event_has_typed_details() -> None:
    details = {
        "channel": "phase", "extra_k_per_w": 1.21, "extra_se_k_per_w": 0.05,
        "recent_k_per_w": 1.6, "recent_se_k_per_w": 0.04, "statistic": 35.2, "threshold": 35.0,
        "since_t_s": 1.8e9, "samples": 1290, "cleared": False, "seq": 7,
    }  # fmt: skip
    event = Event.from_json({**EVENT, "kind": "thermal.drift", "details": details})
    drift = event.drift
    assert drift is not None
    assert (drift.channel, drift.extra_k_per_w, drift.samples) == ("phase", 1.21, 1290)
    assert not drift.cleared
    assert Event.from_json(EVENT).drift is None
    with pytest.raises(UnexpectedResponse, match=r"details\.samples: missing"):
        _ = Event.from_json({**EVENT, "kind": "thermal.drift",
                             "details": {k: v for k, v in details.items() if k != "samples"}
                             }).drift  # fmt: skip


def test_status_carries_the_drift_of_each_path() -> None:
    drift = {"raised": True, "statistic": 3.0, "threshold": 35.0, "extra_k_per_w": 1.5,
             "extra_se_k_per_w": 0.1, "since_s": 1.8e9, "recent_k_per_w": None,
             "recent_se_k_per_w": None}  # fmt: skip
    phase = PhaseStatus.from_json({
        "index": 1, "condition": "active", "current_a": 20.0, "temp_c": 60.0, "share": 0.25,
        "rated_current_a": 30.0, "junction_limit_c": 125.0, "flags": [], "drift": drift,
    })  # fmt: skip
    assert isinstance(phase.drift, DriftStatus)
    assert phase.drift.raised
    assert phase.drift.extra_k_per_w == 1.5
