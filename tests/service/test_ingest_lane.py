"""The samples route's lane (routes/samples.py) answers every request as the FastAPI route it
stands in for: the same status, body and headers for the good, the refused and the malformed,
with keys on. The same script runs against an app with the lane and one without it."""

from __future__ import annotations

import json
from typing import Any

import httpx
import pytest
from tests.conftest import MakeSettings
from tests.factories import rail_spec, sample

from phaseward.api.app import close, create_app
from phaseward.api.routes import samples as samples_routes
from phaseward.monitor import access

pytestmark = pytest.mark.anyio
HEALTHY = [20.0] * 4
KEPT_HEADERS = ("content-type", "www-authenticate", "retry-after", "x-request-id")


async def script(make_settings: MakeSettings, *, lane: bool) -> list[Any]:
    """Every kind of ingest request, and what each was answered (the two runs share a
    database: each has a rail of its own, named alike in the answers)."""
    ours = "lane-a" if lane else "route-a"
    app = create_app(make_settings(auth_mode="keys", max_body_bytes=4096))
    if not lane:
        app.router.routes.remove(samples_routes.LANE)
    keys = {}
    for role, rails in (("admin", None), ("ingest", None), ("read", None), ("ingest", ["other"])):
        _, plain = access.create(app.state.sessions, name=f"{role}", role=role, rails=rails)
        keys[role if rails is None else "elsewhere"] = {"authorization": f"Bearer {plain}"}
    bad_value = sample(1, HEALTHY) | {"vin_v": "twelve"}
    requests: list[tuple[str, str, dict[str, Any]]] = [
        (ours, "ingest", {"json": sample(0, HEALTHY)}),
        (ours, "ingest", {"json": sample(0, HEALTHY)}),  # a resend
        (ours, "ingest", {"json": [sample(1, HEALTHY), sample(0, [21.0] * 4)]}),  # conflict
        (ours, "ingest", {"json": [bad_value]}),
        (ours, "ingest", {"content": b"{not json"}),
        (ours, "ingest", {"content": b"x", "headers": {"content-type": "text/plain"}}),
        (ours, "ingest", {"json": [sample(k, HEALTHY) for k in range(2, 40)]}),  # > 4 kB
        (ours, "read", {"json": sample(2, HEALTHY)}),
        (ours, "elsewhere", {"json": sample(2, HEALTHY)}),
        (ours, "none", {"json": sample(2, HEALTHY)}),
        ("no-such-rail", "ingest", {"json": sample(0, HEALTHY)}),
        ("Bad_Id", "ingest", {"json": sample(0, HEALTHY)}),
        (ours, "ingest", {"json": [sample(2, HEALTHY), sample(3, HEALTHY)]}),
    ]
    answers = []
    transport = httpx.ASGITransport(app=app)
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as c:
        created = await c.post("/v1/rails", json=rail_spec(id=ours), headers=keys["admin"])
        assert created.status_code == 201
        for n, (rail_id, who, kw) in enumerate(requests):
            headers = keys.get(who, {}) | kw.pop("headers", {}) | {"x-request-id": f"r{n}"}
            answer = await c.post(f"/v1/rails/{rail_id}/samples", headers=headers, **kw)
            kept = {h: answer.headers.get(h) for h in KEPT_HEADERS}
            doc = json.loads(answer.text.replace(ours, "<rail>"))
            answers.append((answer.status_code, doc, kept))
        window = await c.get(
            f"/v1/rails/{ours}/samples", params={"since": 0, "until": 1e11}, headers=keys["read"]
        )
        answers.append(window.json()["seq"])
    close(app)
    return answers


async def test_the_lane_answers_as_the_route_does(
    make_settings: MakeSettings, monkeypatch: pytest.MonkeyPatch
) -> None:
    served = 0
    real = samples_routes._IngestLane.__call__

    async def counted(self: Any, *args: Any) -> None:
        nonlocal served
        served += 1
        await real(self, *args)

    monkeypatch.setattr(samples_routes._IngestLane, "__call__", counted)
    through_route = await script(make_settings, lane=False)
    assert served == 0
    through_lane = await script(make_settings, lane=True)
    # All but the rail id the path pattern refuses, and what the gate answers before routing
    # (no key; a body declared over the limit).
    assert served == 10
    assert through_lane == through_route
    statuses = [a[0] for a in through_route[:-1]]
    assert statuses == [200, 200, 409, 422, 400, 415, 413, 403, 403, 401, 404, 422, 200]
    assert through_route[-1] == [0, 2, 3]  # nothing of a refused request was stored
