"""Schemathesis over the whole OpenAPI document, in process against the ASGI app.

Every operation gets generated requests, valid and invalid, against a database seeded with a
rail (with a reliability section), samples with a phase isolation (so there are events), a
trace and a finished rehearsal, so reads hit real rows. Checks: no 5xx, every response
matches the schema (status code, content type, body), invalid requests are refused.
"""

from __future__ import annotations

from collections.abc import Iterator

import anyio
import httpx
import pytest
import schemathesis
from fastapi import FastAPI
from schemathesis import Case
from schemathesis.schemas import BaseSchema
from tests.factories import rail_spec, sample

from phaseward.api.app import create_app
from phaseward.settings import Settings

EXAMPLES_PER_OPERATION = 12
CONFIG = schemathesis.Config.from_dict(
    {
        "generation": {
            "mode": "all",
            "max-examples": EXAMPLES_PER_OPERATION,
            "database": "none",
            "with-security-parameters": False,
        },
        "phases": {"stateful": {"enabled": False}},
        "checks": {
            "enabled": False,
            "not_a_server_error": {"enabled": True},
            "status_code_conformance": {"enabled": True},
            "content_type_conformance": {"enabled": True},
            "response_schema_conformance": {"enabled": True},
            "negative_data_rejection": {"enabled": True},
        },
        "max-stream-events": 5,
        "request-timeout": 30,
        # The event stream has no end of its own: whatever it sent in half a second is checked.
        "operations": [{"include-path": "/v1/events/stream", "request-timeout": 0.5}],
    }
)
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
        app.state.jobs.shutdown()
        app.state.engine.dispose()


schema = schemathesis.pytest.from_fixture("api_schema")


@schema.parametrize()
def test_every_operation_keeps_its_contract(case: Case) -> None:
    case.call_and_validate()
