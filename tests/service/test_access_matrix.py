"""The access matrix, generated from the published OpenAPI document: every operation x every
role x a key limited to its own rails, asked about its own rail and about another one.

Each operation is classified below by the role it needs and by what names its rail (a path
parameter, the body, an event, a rehearsal). An operation missing from ``ACCESS`` fails the
test: a new route must be classified before it ships. Expected:

* without a key: 401 (the open routes aside);
* a role that does not grant what the route needs: 403;
* another rail's data, however named: 403 (404 for an event: not even acknowledged to exist);
* otherwise the access check lets the request through (not 401/403), and nothing in the
  answer mentions the other rail.
"""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator
from typing import Any

import httpx
import pytest
from fastapi import FastAPI
from tests.conftest import MakeSettings
from tests.factories import SMALL_RAIL, rail_spec, sample

from phaseward.api.app import close, create_app
from phaseward.monitor import access

pytestmark = pytest.mark.anyio
OPEN = "open"
# (method, path) -> (role needed, what names the rail: "path", "body", "event", "rehearsal",
# or None for routes that are not about one rail and filter what they return); "a|b": either.
ACCESS: dict[tuple[str, str], tuple[str, str | None]] = {
    ("GET", "/healthz"): (OPEN, None),
    ("GET", "/readyz"): (OPEN, None),
    ("GET", "/metrics"): ("read", None),
    ("POST", "/v1/rails"): ("admin", "body"),
    ("GET", "/v1/rails"): ("read", None),
    ("GET", "/v1/rails/{rail_id}"): ("read", "path"),
    ("PUT", "/v1/rails/{rail_id}"): ("admin", "path"),
    ("DELETE", "/v1/rails/{rail_id}"): ("admin", "path"),
    ("GET", "/v1/rails/{rail_id}/status"): ("read", "path"),
    ("POST", "/v1/rails/{rail_id}/samples"): ("ingest", "path"),
    ("GET", "/v1/rails/{rail_id}/samples"): ("read", "path"),
    ("GET", "/v1/rails/{rail_id}/history"): ("read", "path"),
    ("GET", "/v1/events/stream"): ("read", None),
    ("GET", "/v1/events"): ("read", None),
    ("GET", "/v1/rails/{rail_id}/events"): ("read", "path"),
    ("POST", "/v1/events/{event_id}/ack"): ("operate", "event"),
    ("GET", "/v1/rails/{rail_id}/screening"): ("operate", "path"),
    ("GET", "/v1/rails/{rail_id}/ratings"): ("operate", "path"),
    ("POST", "/v1/rails/{rail_id}/forecast"): ("operate", "path"),
    ("GET", "/v1/rails/{rail_id}/reliability"): ("operate", "path"),
    ("POST", "/v1/rails/{rail_id}/calibrations"): ("operate", "path"),
    ("POST", "/v1/tools/breaker-stress"): ("operate", None),
    ("POST", "/v1/traces"): ("operate", None),
    ("GET", "/v1/traces/{trace_id}"): ("operate", None),
    ("POST", "/v1/rehearsals"): ("operate", "body"),
    ("GET", "/v1/rehearsals/{rehearsal_id}"): ("operate", "rehearsal"),
    ("GET", "/v1/rehearsals/{rehearsal_id}/table.csv"): ("operate", "rehearsal"),
    ("GET", "/v1/rehearsals/{rehearsal_id}/pareto.svg"): ("operate", "rehearsal"),
    ("GET", "/v1/rehearsals/{rehearsal_id}/rows/{row}/settings.json"): ("operate", "rehearsal"),
    ("GET", "/v1/rehearsals/{rehearsal_id}/rows/{row}/settings.h"): ("operate", "rehearsal"),
    ("POST", "/v1/tools/calibrations"): ("operate", None),
    ("POST", "/v1/rails/{rail_id}/events/{event_id}/capture"): ("ingest|operate", "path"),
    ("GET", "/v1/rails/{rail_id}/events/{event_id}/capture"): ("read", "path"),
}
ROLES = ("ingest", "read", "operate", "admin")
GRANTS = {"ingest": {"ingest"}, "read": {"read"}, "operate": {"read", "operate"},
          "admin": {"ingest", "read", "operate", "admin"}}  # fmt: skip
MINE, THEIRS, NEW = "mine", "theirs", "mine-new"  # NEW: the own rail created and deleted
TRACE_CSV = "time_s,vin_v,i0_a,i1_a\n" + "\n".join(f"{k},12,10,10" for k in range(10))


@pytest.fixture
def keyed_app(make_settings: MakeSettings) -> FastAPI:
    return create_app(make_settings(auth_mode="keys", rate_per_s=1000.0, rate_burst=100_000,
                                    auth_failure_burst=1000))  # fmt: skip


@pytest.fixture
async def anon(keyed_app: FastAPI) -> AsyncIterator[httpx.AsyncClient]:
    transport = httpx.ASGITransport(app=keyed_app)
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as c:
        yield c
    close(keyed_app)


def bearer(app: FastAPI, role: str, rails: list[str] | None) -> dict[str, str]:
    _, plain = access.create(app.state.sessions, name=f"{role} matrix", role=role, rails=rails)
    return {"authorization": f"Bearer {plain}"}


async def finished(c: httpx.AsyncClient, job_id: int, headers: dict[str, str]) -> None:
    for _ in range(400):
        state = (await c.get(f"/v1/rehearsals/{job_id}", headers=headers)).json()
        if state["status"] == "done":
            return
        assert state["status"] != "failed", state
        await asyncio.sleep(0.05)
    raise AssertionError(f"rehearsal {job_id} did not finish")


class World:
    """Two rails with samples, events and a finished rehearsal each, and an uploaded trace."""

    def __init__(self, c: httpx.AsyncClient, root: dict[str, str]) -> None:
        self.c, self.root = c, root
        self.events: dict[str, int] = {}
        self.rehearsals: dict[str, int] = {}
        self.trace_id = 0
        self.seq = 10

    async def build(self) -> None:
        for rail in (MINE, THEIRS):
            assert (await self.c.post("/v1/rails", json=rail_spec(id=rail), headers=self.root)
                    ).status_code == 201  # fmt: skip
            body = [sample(k, [20.0] * 4, temps=t) for k, t in enumerate([100.0, 120.0])]
            posted = await self.c.post(f"/v1/rails/{rail}/samples", json=body, headers=self.root)
            assert posted.status_code == 200
            page = await self.c.get(f"/v1/rails/{rail}/events", headers=self.root)
            self.events[rail] = page.json()["items"][0]["id"]
            job = await self.c.post("/v1/rehearsals", json=self.rehearsal(rail), headers=self.root)
            assert job.status_code == 202, job.text
            self.rehearsals[rail] = job.json()["id"]
            await finished(self.c, self.rehearsals[rail], self.root)
        trace = await self.c.post("/v1/traces", content=TRACE_CSV,
                                  headers=self.root | {"content-type": "text/csv"})  # fmt: skip
        self.trace_id = trace.json()["id"]

    @staticmethod
    def rehearsal(rail: str) -> dict[str, Any]:
        return {"trace": {"rail_id": rail, "since": 0, "until": 1e10},
                "settings": {"oc_level_a": 30.0, "oc_debounce_s": 1.0}}  # fmt: skip

    async def prepare(self, method: str, path: str) -> None:
        """The own new rail exists for DELETE and not for POST /v1/rails."""
        await self.c.delete(f"/v1/rails/{NEW}", headers=self.root)
        if method == "DELETE":
            spec = rail_spec(id=NEW)
            assert (await self.c.post("/v1/rails", json=spec, headers=self.root)).status_code == 201

    def request(self, method: str, path: str, rail: str) -> dict[str, Any]:
        """URL and body of ``method path`` about ``rail`` (its own or the other one)."""
        own = rail == MINE
        values = {
            "rail_id": (NEW if own else THEIRS) if method == "DELETE" else rail,
            "event_id": self.events[rail], "rehearsal_id": self.rehearsals[rail],
            "trace_id": self.trace_id, "row": 0,
        }  # fmt: skip
        url = path.format(**values)
        out: dict[str, Any] = {"method": method, "url": url}
        self.seq += 1
        bodies: dict[str, Any] = {
            "/v1/rails": rail_spec(id=NEW if own else "theirs-new"),
            "/v1/rails/{rail_id}": {k: v for k, v in SMALL_RAIL.items() if k != "id"},
            "/v1/rails/{rail_id}/samples": sample(self.seq, [20.0] * 4),
            "/v1/events/{event_id}/ack": {"by": "matrix"},
            "/v1/rails/{rail_id}/forecast": {"horizon_s": 600},
            "/v1/tools/calibrations": {
                "t_s": [float(k) for k in range(40)],
                "temp_c": [25.0 + 8.0 * (1 - 0.9**k) for k in range(40)], "power_w": 1.0},
            "/v1/rails/{rail_id}/calibrations": {
                "t_s": [float(k) for k in range(40)],
                "temp_c": [25.0 + 8.0 * (1 - 0.9**k) for k in range(40)], "power_w": 1.0},
            "/v1/tools/breaker-stress": {
                "vin_v": 12, "current_limit_a": 25, "delay_s": 0.004, "junction_limit_c": 150,
                "foster": [{"r_k_per_w": 0.4, "tau_s": 0.002}]},
            "/v1/rehearsals": self.rehearsal(rail),
        }  # fmt: skip
        if method in ("POST", "PUT") and path in bodies:
            out["json"] = bodies[path]
        if path.endswith("/capture") and method == "POST":
            out["content"] = "t_s,vin_v,vout_v,i0_a\n" + "".join(
                f"{k * 1e-6},12,1,{20 if k < 50 else 0}\n" for k in range(100)
            )
            out["headers"] = {"content-type": "text/csv"}
        if path == "/v1/traces":
            out["content"] = TRACE_CSV
            out["headers"] = {"content-type": "text/csv"}
        if path.endswith(("/samples", "/history")) and method == "GET":
            out["params"] = {"since": 0, "until": 1e10}
        if path == "/v1/events/stream":
            out["params"] = {"after": 0, "limit": 1}
        return out


def expected(needed: str, scope: str | None, role: str | None, rail: str) -> set[int] | None:
    """The statuses allowed for this case; None: any status but 401 and 403."""
    if needed == OPEN:
        return None
    if role is None:
        return {401}
    if not set(needed.split("|")) & GRANTS[role]:
        return {403}
    if scope is not None and rail == THEIRS:
        return {404} if scope == "event" else {403}
    return None


async def test_every_route_by_every_role_on_its_own_and_another_rail(
    keyed_app: FastAPI, anon: httpx.AsyncClient
) -> None:
    operations = {
        (method.upper(), path)
        for path, item in keyed_app.openapi()["paths"].items()
        for method in item
    }
    assert operations - set(ACCESS) == set(), "classify these routes in ACCESS"
    root = bearer(keyed_app, "admin", None)
    world = World(anon, root)
    await world.build()
    keys = {role: bearer(keyed_app, role, [MINE, NEW]) for role in ROLES}
    wrong: list[str] = []
    cases = 0
    for (method, path), (needed, scope) in sorted(ACCESS.items()):
        for role in (None, *ROLES):
            for rail in (MINE, THEIRS):
                await world.prepare(method, path)
                req = world.request(method, path, rail)
                req["headers"] = req.get("headers", {}) | (keys[role] if role else {})
                answer = await anon.request(**req)
                cases += 1
                allowed = expected(needed, scope, role, rail)
                label = f"{method} {req['url']} as {role or 'no key'}: {answer.status_code}"
                if allowed is None:
                    if answer.status_code in (401, 403):
                        wrong.append(f"{label} refused: {answer.text[:120]}")
                    elif role is not None and THEIRS in answer.text:
                        wrong.append(f"{label} shows the other rail: {answer.text[:120]}")
                elif answer.status_code not in allowed:
                    wrong.append(f"{label}, expected {sorted(allowed)}: {answer.text[:120]}")
    assert cases == len(ACCESS) * (len(ROLES) + 1) * 2
    assert wrong == []
