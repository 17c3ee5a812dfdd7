"""Access: who is asking (an access key, or open mode on loopback), whether the key's role and
rails allow the request, and a per-key rate limit.

No ``from __future__ import annotations`` here: the dependency factories close over the role
they check, and FastAPI must see those annotations as objects, not strings to resolve later.
"""

import threading
import time
from collections.abc import Callable
from typing import Annotated

from fastapi import Depends, Path, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from phaseward.errors import Forbidden, TooManyRequests, Unauthorized
from phaseward.monitor.access import OPEN, Principal, authenticate
from phaseward.settings import Settings

bearer = HTTPBearer(auto_error=False, description="an access key: Authorization: Bearer pwk_...")


class RateLimiter:
    """Token buckets per key: ``rate_per_s`` sustained, ``burst`` at once."""

    def __init__(self, rate_per_s: float, burst: int) -> None:
        self.rate, self.burst = rate_per_s, float(burst)
        self._buckets: dict[int, tuple[float, float]] = {}
        self._lock = threading.Lock()

    def take(self, key_id: int) -> None:
        now = time.monotonic()
        with self._lock:
            tokens, then = self._buckets.get(key_id, (self.burst, now))
            tokens = min(self.burst, tokens + (now - then) * self.rate)
            if tokens < 1.0:
                self._buckets[key_id] = (tokens, now)
                raise TooManyRequests(
                    f"over {self.rate:g} requests per second for this key",
                    retry_after_s=(1.0 - tokens) / self.rate,
                )
            self._buckets[key_id] = (tokens - 1.0, now)


async def principal(
    request: Request,
    credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(bearer)],
) -> Principal:
    settings: Settings = request.app.state.settings
    if settings.auth_mode == "open":
        return OPEN
    if credentials is None or not credentials.credentials:
        raise Unauthorized("send an access key: Authorization: Bearer <key>", field="authorization")
    sessions = request.app.state.read_sessions

    def lookup() -> Principal | None:
        with sessions() as session, session.begin():
            return authenticate(session, credentials.credentials)

    who = await run_in_threadpool(lookup)
    if who is None:
        raise Unauthorized(
            "the access key is not valid (unknown or revoked)", field="authorization"
        )
    assert who.key_id is not None
    request.app.state.rate_limiter.take(who.key_id)
    return who


def role(needed: str) -> Callable[[Principal], Principal]:
    def check(who: Annotated[Principal, Depends(principal)]) -> Principal:
        if not who.grants(needed):
            raise Forbidden(f"a '{who.role}' key may not {needed}", field="authorization")
        return who

    return check


def rail_role(needed: str) -> Callable[[str, Principal], Principal]:
    def check(
        rail_id: Annotated[str, Path()],
        who: Annotated[Principal, Depends(role(needed))],
    ) -> Principal:
        if not who.may_use(rail_id):
            raise Forbidden(f"this key may not use rail '{rail_id}'", field="rail_id")
        return who

    return check


def rail_either(first: str, second: str) -> Callable[[str, Principal], Principal]:
    """A key whose role grants ``first`` or ``second``, limited to the path's rail."""

    def check(
        rail_id: Annotated[str, Path()],
        who: Annotated[Principal, Depends(principal)],
    ) -> Principal:
        if not (who.grants(first) or who.grants(second)):
            raise Forbidden(
                f"a '{who.role}' key may not {first} or {second}", field="authorization"
            )
        if not who.may_use(rail_id):
            raise Forbidden(f"this key may not use rail '{rail_id}'", field="rail_id")
        return who

    return check


Reader = Annotated[Principal, Depends(role("read"))]
Operator = Annotated[Principal, Depends(role("operate"))]
Admin = Annotated[Principal, Depends(role("admin"))]
RailReader = Annotated[Principal, Depends(rail_role("read"))]
RailIngester = Annotated[Principal, Depends(rail_role("ingest"))]
RailOperator = Annotated[Principal, Depends(rail_role("operate"))]
RailAdmin = Annotated[Principal, Depends(rail_role("admin"))]
# Captures come from the rack that posts samples or from an operator at the bench.
RailUploader = Annotated[Principal, Depends(rail_either("ingest", "operate"))]
