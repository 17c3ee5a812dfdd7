"""Access keys and roles: 401 without a valid key, 403 for the wrong role or rail, keys stored
only as digests, revocation, and the per-key rate limit (429 with Retry-After)."""

from __future__ import annotations

from collections.abc import AsyncIterator

import httpx
import pytest
from fastapi import FastAPI
from sqlalchemy import text
from tests.conftest import MakeSettings
from tests.factories import SMALL_RAIL, rail_spec, sample

from phaseward.api.app import close, create_app
from phaseward.monitor import access
from phaseward.settings import Settings

pytestmark = pytest.mark.anyio


@pytest.fixture
def keyed_app(request: pytest.FixtureRequest, make_settings: MakeSettings) -> FastAPI:
    """An app that needs keys; a test marked with a ``burst`` parameter gets a tight limit."""
    burst = getattr(request, "param", 1000)
    # A slow refill, so a loaded machine's slow requests do not refill the bucket in time.
    return create_app(make_settings(auth_mode="keys", rate_per_s=0.2, rate_burst=burst))


@pytest.fixture
async def anon(keyed_app: FastAPI) -> AsyncIterator[httpx.AsyncClient]:
    transport = httpx.ASGITransport(app=keyed_app)
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as c:
        yield c
    close(keyed_app)


def key(app: FastAPI, role: str, rails: list[str] | None = None) -> dict[str, str]:
    _, plain = access.create(app.state.sessions, name=f"{role} test", role=role, rails=rails)
    return {"authorization": f"Bearer {plain}"}


async def test_no_key_or_a_wrong_key_is_401(keyed_app: FastAPI, anon: httpx.AsyncClient) -> None:
    missing = await anon.get("/v1/rails")
    assert missing.status_code == 401
    assert missing.json()["field"] == "authorization"
    assert missing.headers["www-authenticate"].startswith("Bearer")
    wrong = await anon.get("/v1/rails", headers={"authorization": "Bearer pwk_not-a-real-key"})
    assert wrong.status_code == 401
    assert (await anon.get("/healthz")).status_code == 200  # the health check stays open


async def test_roles(keyed_app: FastAPI, anon: httpx.AsyncClient) -> None:
    admin, reader = key(keyed_app, "admin"), key(keyed_app, "read")
    ingest, operate = key(keyed_app, "ingest"), key(keyed_app, "operate")
    assert (await anon.post("/v1/rails", json=SMALL_RAIL, headers=reader)).status_code == 403
    assert (await anon.post("/v1/rails", json=SMALL_RAIL, headers=admin)).status_code == 201
    posted = await anon.post(
        "/v1/rails/bench-a/samples", json=sample(0, [20.0] * 4), headers=ingest
    )
    assert posted.status_code == 200
    refused = await anon.post(
        "/v1/rails/bench-a/samples", json=sample(1, [20.0] * 4), headers=reader
    )
    assert refused.status_code == 403
    assert "'read' key may not ingest" in refused.json()["detail"]
    assert (await anon.get("/v1/rails/bench-a/status", headers=ingest)).status_code == 403
    assert (await anon.get("/v1/rails/bench-a/status", headers=reader)).status_code == 200
    assert (await anon.get("/v1/rails/bench-a/screening", headers=reader)).status_code == 403
    assert (await anon.get("/v1/rails/bench-a/screening", headers=operate)).status_code == 200
    event_id = (await anon.get("/v1/events", headers=reader)).json()["items"][0]["id"]
    ack = {"by": "shift lead"}
    assert (
        await anon.post(f"/v1/events/{event_id}/ack", json=ack, headers=reader)
    ).status_code == 403
    acked = await anon.post(f"/v1/events/{event_id}/ack", json=ack, headers=operate)
    assert acked.status_code == 200
    assert acked.json()["acked_key"] == "operate test"  # the key's name, whatever "by" says
    assert (await anon.delete("/v1/rails/bench-a", headers=operate)).status_code == 403


async def test_a_key_limited_to_rails_sees_nothing_else(
    keyed_app: FastAPI, anon: httpx.AsyncClient
) -> None:
    admin = key(keyed_app, "admin")
    for rid in ("team-a", "team-b"):
        assert (
            await anon.post("/v1/rails", json=rail_spec(id=rid), headers=admin)
        ).status_code == 201
        await anon.post(f"/v1/rails/{rid}/samples", json=sample(0, [20.0] * 4), headers=admin)
    ours = key(keyed_app, "operate", rails=["team-a"])
    assert (await anon.get("/v1/rails/team-a/status", headers=ours)).status_code == 200
    other = await anon.get("/v1/rails/team-b/status", headers=ours)
    assert other.status_code == 403
    assert other.json()["field"] == "rail_id"
    assert [r["id"] for r in (await anon.get("/v1/rails", headers=ours)).json()] == ["team-a"]
    rails_seen = {
        e["rail_id"] for e in (await anon.get("/v1/events", headers=ours)).json()["items"]
    }
    assert rails_seen == {"team-a"}
    b_event = (await anon.get("/v1/rails/team-b/events", headers=admin)).json()["items"][0]["id"]
    ack = await anon.post(f"/v1/events/{b_event}/ack", json={"by": "x"}, headers=ours)
    assert ack.status_code == 404  # another team's event is not even acknowledged to exist
    writer = key(keyed_app, "ingest", rails=["team-a"])
    assert (
        await anon.post("/v1/rails/team-b/samples", json=sample(1, [20.0] * 4), headers=writer)
    ).status_code == 403


async def test_keys_are_stored_as_digests_and_revocable(
    keyed_app: FastAPI, anon: httpx.AsyncClient
) -> None:
    row, plain = access.create(keyed_app.state.sessions, name="rack", role="read", rails=None)
    with keyed_app.state.engine.connect() as conn:
        stored = conn.execute(text("SELECT prefix, digest FROM api_keys")).one()
    assert plain not in stored
    assert stored.prefix == plain[:12]
    headers = {"authorization": f"Bearer {plain}"}
    assert (await anon.get("/v1/rails", headers=headers)).status_code == 200
    access.revoke(keyed_app.state.sessions, row.id)
    assert (await anon.get("/v1/rails", headers=headers)).status_code == 401


@pytest.mark.parametrize("keyed_app", [5], indirect=True)
async def test_rate_limit_answers_429_with_retry_after(
    keyed_app: FastAPI, anon: httpx.AsyncClient
) -> None:
    headers = key(keyed_app, "read")
    codes = [(await anon.get("/v1/rails", headers=headers)).status_code for _ in range(8)]
    assert codes[:5] == [200] * 5  # the burst
    assert 429 in codes[5:]
    limited = await anon.get("/v1/rails", headers=headers)
    assert limited.status_code == 429
    assert int(limited.headers["retry-after"]) >= 1
    other = key(keyed_app, "read")  # another key has its own bucket
    assert (await anon.get("/v1/rails", headers=other)).status_code == 200


def test_open_mode_binds_loopback_only() -> None:
    with pytest.raises(ValueError, match="binds loopback only"):
        Settings(auth_mode="open", host="0.0.0.0")


async def test_the_key_is_checked_before_the_body_is_read(
    keyed_app: FastAPI, anon: httpx.AsyncClient
) -> None:
    """Issue 17 item 3: without a key no body is read (the stream would fail if it were)."""
    read: list[int] = []

    async def body() -> AsyncIterator[bytes]:
        for _ in range(100):
            read.append(1)
            yield b"[" * 1000

    answer = await anon.post(
        "/v1/rails", content=body(), headers={"content-type": "application/json"}
    )
    assert answer.status_code == 401
    assert answer.json()["field"] == "authorization"
    assert len(read) <= 1  # the transport may pull the first chunk; the app reads none


@pytest.mark.parametrize(
    "path",
    ["/v1/rails", "/v1/rails/bench-a/forecast", "/v1/tools/breaker-stress", "/v1/rehearsals",
     "/v1/events/1/ack"],
)  # fmt: skip
async def test_every_body_has_a_limit(
    keyed_app: FastAPI, anon: httpx.AsyncClient, path: str
) -> None:
    """Issue 17 item 3: JSON model bodies too are refused past the limit, declared or not."""
    admin = key(keyed_app, "admin")
    assert (await anon.post("/v1/rails", json=SMALL_RAIL, headers=admin)).status_code == 201
    limit = keyed_app.state.settings.max_body_bytes
    big = b'{"x": "' + b"a" * limit + b'"}'
    declared = await anon.post(
        path, content=big, headers=admin | {"content-type": "application/json"}
    )
    assert declared.status_code == 413
    assert declared.json()["field"] == "body"

    async def chunks() -> AsyncIterator[bytes]:  # no Content-Length: counted as it arrives
        for k in range(0, len(big), 65536):
            yield big[k : k + 65536]

    streamed = await anon.post(
        path, content=chunks(), headers=admin | {"content-type": "application/json"}
    )
    assert streamed.status_code == 413
    assert streamed.json()["error"] == "payload_too_large"
    assert len((await anon.get("/v1/rails", headers=admin)).json()) == 1  # nothing stored


@pytest.mark.parametrize("keyed_app", [1000], indirect=True)
async def test_failed_authentication_is_rate_limited_per_address(
    keyed_app: FastAPI, anon: httpx.AsyncClient
) -> None:
    """Issue 17 item 14: a client guessing keys gets 429 after the burst, even for a key that
    would be right; another address is not affected, and a valid key's own limit is apart."""
    burst = keyed_app.state.settings.auth_failure_burst
    good = key(keyed_app, "read")
    codes = [
        (await anon.get("/v1/rails", headers={"authorization": f"Bearer pwk_guess{k}"})).status_code
        for k in range(burst + 3)
    ]
    assert codes[:burst] == [401] * burst
    assert codes[burst:] == [429] * 3
    refused = await anon.get("/v1/rails", headers=good)
    assert refused.status_code == 429
    assert int(refused.headers["retry-after"]) >= 1
    transport = httpx.ASGITransport(app=keyed_app, client=("127.0.0.9", 4000))
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as other:
        assert (await other.get("/v1/rails", headers=good)).status_code == 200
        assert (await other.get("/v1/rails")).status_code == 401
