"""Schemathesis over the whole OpenAPI document, in process against the ASGI app.

Every operation gets generated requests, valid and invalid, against a database seeded with a
rail (with a reliability section), samples with a phase isolation (so there are events), a
trace and a finished rehearsal, so reads hit real rows. Checks: no 5xx, every response
matches the schema (status code, content type, body), invalid requests are refused.
"""

from __future__ import annotations

import json
from collections.abc import AsyncIterator, Iterator
from typing import Any

import anyio
import httpx
import hypothesis
import pytest
import schemathesis
from fastapi import FastAPI
from hypothesis.stateful import run_state_machine_as_test
from schemathesis import Case
from schemathesis.checks import negative_data_rejection
from schemathesis.schemas import BaseSchema
from tests.factories import rail_spec, sample

from phaseward.api.app import close, create_app
from phaseward.api.schemas.events import EventOut
from phaseward.settings import Settings

EXAMPLES_PER_OPERATION = 12
SETTINGS: dict[str, Any] = {
    "generation": {
        "mode": "all",
        "max-examples": EXAMPLES_PER_OPERATION,
        "database": "none",
        "deterministic": True,  # the same requests on every run: a gate, not a lottery
        # Open mode: the keys the document declares are not needed (tests/fuzz/
        # test_authentication.py checks every operation refuses a missing key).
        "with-security-parameters": False,
    },
    "phases": {"stateful": {"enabled": False}},
    "checks": {
        "enabled": False,
        "not_a_server_error": {"enabled": True},
        "status_code_conformance": {"enabled": True},
        "content_type_conformance": {"enabled": True},
        "response_schema_conformance": {"enabled": True},
        # Invalid data may also be refused for its size (413, every body has a limit).
        "negative_data_rejection": {
            "enabled": True,
            "expected-statuses": [
                400,
                401,
                403,
                404,
                405,
                406,
                409,
                413,
                415,
                422,
                428,
                429,
                "5XX",
            ],
        },
    },
    "max-stream-events": 5,
    "request-timeout": 30,
    # The event stream has no end of its own: whatever it sent in half a second is checked.
    "operations": [{"include-path": "/v1/events/stream", "request-timeout": 0.5}],
}
CONFIG = schemathesis.Config.from_dict(SETTINGS)
# The same checks over sequences that follow the document's links.
STATEFUL = schemathesis.Config.from_dict(SETTINGS | {"phases": {"stateful": {"enabled": True}}})
# Fault captures arrive as CSV text or NumPy files: generated bodies are sent as text or bytes.
schemathesis.serializer.alias("text/csv", "text/plain")
for _media in ("application/x-npy", "application/x-npz", "application/zip"):
    schemathesis.serializer.alias(_media, "application/octet-stream")


@schemathesis.serializer("application/x-ndjson")
def _ndjson(_: Any, value: Any) -> bytes:
    """Samples as NDJSON: one JSON document a line (a generated array is one sample a line)."""
    lines = value if isinstance(value, list) else [value]
    return "".join(json.dumps(v) + "\n" for v in lines).encode()


TRACE_CSV = "time_s,vin_v,i0_a,i1_a\n" + "".join(
    f"{k},12,{25 if 3 <= k <= 6 else 10},10\n" for k in range(10)
)


def seeded(settings: Settings) -> FastAPI:
    app = create_app(settings)

    async def seed() -> None:
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://seed") as c:
            rail = rail_spec(reliability={"fit_at_ref": 50.0, "ref_c": 55.0})
            assert (await c.post("/v1/rails", json=rail)).status_code == 201
            body = [sample(k, [20.0] * 4) for k in range(3)]
            for k in range(3, 8):
                tripped = sample(k, [26.7, 0.0, 26.7, 26.7])
                tripped["phases"][1]["breaker_tripped"] = True
                body.append(tripped)
            answer = await c.post("/v1/rails/bench-a/samples", json=body)
            assert answer.status_code == 200, answer.text
            trace = await c.post(
                "/v1/traces", content=TRACE_CSV, headers={"content-type": "text/csv"}
            )
            assert trace.status_code == 201, trace.text
            job = await c.post(
                "/v1/rehearsals",
                json={"trace": {"trace_id": trace.json()["id"]}, "settings": {"oc_level_a": 20.0}},
            )
            assert job.status_code == 202, job.text
            for _ in range(400):
                state = (await c.get(f"/v1/rehearsals/{job.json()['id']}")).json()
                if state["status"] in ("done", "failed"):
                    break
                await anyio.sleep(0.025)
            assert state["status"] == "done", state

    anyio.run(seed)
    return app


@pytest.fixture
def api_schema(settings: Settings) -> Iterator[BaseSchema]:
    app = seeded(settings.model_copy(update={"auth_mode": "open"}))
    try:
        yield schemathesis.openapi.from_asgi("/openapi.json", app, config=CONFIG)
    finally:
        close(app)


schema = schemathesis.pytest.from_fixture("api_schema")


REPEATABLE = {"kind", "severity"}  # the query parameters declared as arrays


def repeats_a_scalar(case: Case) -> bool:
    """A scalar query parameter sent more than once: the framework keeps the last value, as
    most do, so such a request is not refused even when one of the values is bad."""
    return any(isinstance(v, list) and k not in REPEATABLE for k, v in (case.query or {}).items())


@schema.parametrize()
def test_every_operation_keeps_its_contract(case: Case) -> None:
    response = case.call()
    excluded = [negative_data_rejection] if repeats_a_scalar(case) else []
    case.validate_response(response, excluded_checks=excluded)


# ------------------------------------------------- regressions for what the fuzzing found
# The generated requests above are few per operation; these pin each finding down.

TOO_BIG = 2**63  # one past the largest id either database can bind
BREAKER: dict[str, Any] = {
    "vin_v": 12.0, "current_limit_a": 20.0, "delay_s": 1e-3,
    "foster": [{"r_k_per_w": 0.4, "tau_s": 2e-3}],
    "soa": [{"time_s": 1e-4, "current_a": 100.0}, {"time_s": 1e-2, "current_a": 15.0}],
}  # fmt: skip


@pytest.fixture
async def seeded_client(settings: Settings) -> AsyncIterator[httpx.AsyncClient]:
    app = await anyio.to_thread.run_sync(seeded, settings.model_copy(update={"auth_mode": "open"}))
    transport = httpx.ASGITransport(app=app)
    try:
        async with httpx.AsyncClient(transport=transport, base_url="http://fuzz.test") as c:
            yield c
    finally:
        close(app)


def assert_error_body(answer: httpx.Response, status: int, field: str | None) -> None:
    assert answer.status_code == status, answer.text
    body = answer.json()
    assert set(body) >= {"error", "detail", "field"}, body
    assert body["field"] == field
    assert body["detail"]


@pytest.mark.anyio
async def test_a_body_that_is_not_text_answers_in_the_error_shape(
    seeded_client: httpx.AsyncClient,
) -> None:
    """FastAPI's own 400 for a body it cannot decode was a bare {"detail"}."""
    answer = await seeded_client.post(
        "/v1/rails/bench-a/forecast",
        content=b"\xff\xfe{",
        headers={"content-type": "application/json"},
    )
    assert_error_body(answer, 400, "body")
    missing = await seeded_client.get("/v1/no-such-thing")
    assert_error_body(missing, 404, None)


@pytest.mark.anyio
@pytest.mark.parametrize("number", [TOO_BIG, -TOO_BIG - 1])
async def test_ids_beyond_64_bits_are_refused_not_a_500(
    seeded_client: httpx.AsyncClient, number: int
) -> None:
    """Path ids were unbounded ints: the driver could not bind them (OverflowError, a 500)."""
    c = seeded_client
    for path, field in [
        (f"/v1/traces/{number}", "trace_id"),
        (f"/v1/rehearsals/{number}", "rehearsal_id"),
        (f"/v1/rehearsals/{number}/table.csv", "rehearsal_id"),
        (f"/v1/rehearsals/{number}/pareto.svg", "rehearsal_id"),
    ]:
        assert_error_body(await c.get(path), 422, field)
    ack = await c.post(f"/v1/events/{number}/ack", json={"by": "bench operator"})
    assert_error_body(ack, 422, "event_id")
    job = {"trace": {"trace_id": number}, "settings": {"oc_level_a": 20.0}}
    assert (await c.post("/v1/rehearsals", json=job)).status_code == 422


@pytest.mark.anyio
@pytest.mark.parametrize("cursor", [str(TOO_BIG), "²", "١٢"])
async def test_cursors_must_be_ascii_ids_that_fit(
    seeded_client: httpx.AsyncClient, cursor: str
) -> None:
    """str.isdigit() passed superscripts (int() then raised) and ids past 64 bits."""
    page = await seeded_client.get("/v1/events", params={"cursor": cursor})
    assert_error_body(page, 422, "cursor")
    stream = await seeded_client.get(
        "/v1/events/stream",
        params={"limit": 1},
        headers={"last-event-id": cursor.encode()},  # raw bytes, as a client may send them
    )
    assert_error_body(stream, 422, "last-event-id")


@pytest.mark.anyio
async def test_the_event_stream_sends_what_its_schema_says(
    seeded_client: httpx.AsyncClient,
) -> None:
    """The stream was documented as one string; schemathesis reads a 3.1 stream's schema as
    each frame's, and each frame's data is an event as GET /v1/events lists it."""
    answer = await seeded_client.get("/v1/events/stream", params={"after": 0, "limit": 3})
    assert answer.status_code == 200, answer.text
    frames = [f for f in answer.text.split("\n\n") if f.startswith("id:")]
    assert len(frames) == 3
    for frame in frames:
        fields = dict(line.split(": ", 1) for line in frame.splitlines())
        event = EventOut.model_validate_json(fields["data"])
        assert (fields["id"], fields["event"]) == (str(event.id), event.kind)
    document = (await seeded_client.get("/openapi.json")).json()
    stream = document["paths"]["/v1/events/stream"]["get"]
    frame_schema = stream["responses"]["200"]["content"]["text/event-stream"]["schema"]
    assert frame_schema["properties"]["data"]["contentSchema"] == {
        "$ref": "#/components/schemas/EventOut"
    }


@pytest.mark.anyio
@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"foster": [{"r_k_per_w": 0.4, "tau_s": 5e-324}]}, "foster[0].tau_s"),
        ({"delay_s": 5e-324}, "delay_s"),
        ({"soa": [{"time_s": 5e-324, "current_a": 100.0}]}, "soa[0].time_s"),
    ],
)
async def test_subnormal_times_are_refused(
    seeded_client: httpx.AsyncClient, change: dict[str, Any], field: str
) -> None:
    """A time of 5e-324 s passed gt=0: t / tau overflowed, and a tenth of it was 0 for
    np.geomspace (a 500). Times now start at a nanosecond."""
    answer = await seeded_client.post("/v1/tools/breaker-stress", json=BREAKER | change)
    assert_error_body(answer, 422, field)


@pytest.mark.anyio
async def test_a_subnormal_soa_current_is_far_over_not_a_warning(
    seeded_client: httpx.AsyncClient,
) -> None:
    """current_limit / 5e-324 A overflowed inside np.errstate(divide, invalid) only."""
    soa = [{"time_s": 1e-4, "current_a": 5e-324}, {"time_s": 1e-2, "current_a": 5e-324}]
    answer = await seeded_client.post("/v1/tools/breaker-stress", json=BREAKER | {"soa": soa})
    assert answer.status_code == 200, answer.text
    assert answer.json()["at_delay"]["passes"] is False
    assert answer.json()["at_delay"]["binding"] == "soa"


@pytest.mark.anyio
@pytest.mark.parametrize(
    ("path", "body", "field"),
    [
        ("/v1/tools/breaker-stress", BREAKER | {"vin_v": True}, "vin_v"),
        ("/v1/rehearsals",
         {"trace": {"trace_id": 1}, "settings": {"oc_level_a": 20.0},
          "labels": [{"start_s": 0.0, "end_s": 1.0, "phase": False, "kind": "over_current"}]},
         "labels[0].phase"),
    ],
)  # fmt: skip
async def test_booleans_are_not_numbers(
    seeded_client: httpx.AsyncClient, path: str, body: dict[str, Any], field: str
) -> None:
    """Lax validation took true for 1 and false for 0 where the schema says number."""
    answer = await seeded_client.post(path, json=body)
    assert_error_body(answer, 422, field)


def test_stateful_sequences_along_the_documented_links(settings: Settings) -> None:
    """Create a rail, trace or rehearsal, then follow the document's links to the operations
    that take its id (posting samples, reading status, the rehearsal's table), checking every
    response against the contract as above."""
    app = seeded(settings.model_copy(update={"auth_mode": "open"}))
    try:
        stateful = schemathesis.openapi.from_asgi("/openapi.json", app, config=STATEFUL)
        machine = stateful.as_state_machine()
        assert machine.bundles  # the links were found
        run_state_machine_as_test(
            machine,
            settings=hypothesis.settings(
                max_examples=8, stateful_step_count=4, deadline=None, derandomize=True,
                database=None, suppress_health_check=list(hypothesis.HealthCheck),
            ),
        )  # fmt: skip
    finally:
        close(app)
