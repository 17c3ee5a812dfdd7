"""Access: who is asking (an access key, or open mode on loopback), whether the key's role and
rails allow the request, and rate limits.

The key is checked by ``Gate``, an ASGI middleware, before any route reads a byte of the body:
the framework reads and parses a JSON body before it runs a route's dependencies, so a
dependency alone would let anyone without a key make the server read and parse a large body.
The gate also holds every body to a size limit (413 beyond it) and limits failed
authentication per client address (429), so guessing keys is slow.

What needs a key: everything under ``/v1/`` and ``/metrics``. Open: ``/healthz`` and
``/readyz`` (probes), the OpenAPI document and its viewer (``/openapi.json``, ``/docs`` and
``/docs-assets/``: the contract, no data), and the operator page's files (the page asks for
a key).

Rate limits are per server process: with N replicas a key may reach N times its rate. Sharing
the buckets would put a database write in front of every request, ingest included; a
deployment that needs a fleet-wide limit sets it at its load balancer.

No ``from __future__ import annotations`` here: the dependency factories close over the role
they check, and FastAPI must see those annotations as objects, not strings to resolve later.
"""

import threading
import time
from collections.abc import Awaitable, Callable, Hashable
from typing import Annotated

from fastapi import Depends, Path, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from starlette.datastructures import Headers
from starlette.exceptions import HTTPException
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from phaseward.api.errors import error_response
from phaseward.errors import Forbidden, PayloadTooLarge, TooManyRequests, Unauthorized
from phaseward.monitor.access import OPEN, Principal, authenticate
from phaseward.settings import Settings

bearer = HTTPBearer(auto_error=False, description="an access key: Authorization: Bearer pwk_...")
KEYED_PREFIXES = ("/v1/", "/metrics")  # what needs a key; everything else is open


class RateLimiter:
    """Token buckets per key (an access key's id, a client address): ``rate_per_s``
    sustained, ``burst`` at once."""

    def __init__(self, rate_per_s: float, burst: int, what: str = "this key") -> None:
        self.rate, self.burst, self.what = rate_per_s, float(burst), what
        self._buckets: dict[Hashable, tuple[float, float]] = {}
        self._lock = threading.Lock()

    def _refused(self, tokens: float) -> TooManyRequests:
        return TooManyRequests(
            f"over {self.rate:g} requests per second for {self.what}",
            retry_after_s=(1.0 - tokens) / self.rate,
        )

    def _tokens(self, key: Hashable, now: float) -> float:
        tokens, then = self._buckets.get(key, (self.burst, now))
        return min(self.burst, tokens + (now - then) * self.rate)

    def check(self, key: Hashable) -> None:
        """Refuse if ``key`` has no token left, without taking one."""
        with self._lock:
            tokens = self._tokens(key, time.monotonic())
        if tokens < 1.0:
            raise self._refused(tokens)

    def take(self, key: Hashable) -> None:
        now = time.monotonic()
        with self._lock:
            tokens = self._tokens(key, now)
            if tokens < 1.0:
                self._buckets[key] = (tokens, now)
                raise self._refused(tokens)
            self._buckets[key] = (tokens - 1.0, now)


class Gate:
    """Key first, then the body under its limit (see the module docstring)."""

    def __init__(self, app: ASGIApp, settings: Settings, state: object) -> None:
        self.app, self.settings, self.state = app, settings, state
        self.failures = RateLimiter(
            settings.auth_failure_rate_per_s, settings.auth_failure_burst,
            what="failed authentication from this address",
        )  # fmt: skip

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        path: str = scope["path"]
        try:
            if self.settings.auth_mode == "keys" and path.startswith(KEYED_PREFIXES):
                scope.setdefault("state", {})["principal"] = await self._principal(scope)
            limit = self._limit(scope)
        except (Unauthorized, TooManyRequests, PayloadTooLarge) as err:
            await error_response(err)(scope, receive, send)
            return
        await self.app(scope, _limited(receive, limit), send)

    def _limit(self, scope: Scope) -> int:
        headers = Headers(scope=scope)
        limit = self.settings.max_body_bytes
        if scope["path"] == "/v1/traces" and headers.get("content-type", "").startswith(
            "text/csv"
        ):  # a CSV trace is streamed to disk and parsed row by row; JSON is parsed whole
            limit = self.settings.max_trace_bytes
        elif scope["path"].endswith("/capture"):  # fault captures are spooled to disk
            limit = self.settings.max_capture_bytes
        declared = headers.get("content-length")
        if declared is not None and declared.isdigit() and int(declared) > limit:
            raise PayloadTooLarge(
                f"body of {declared} bytes exceeds the limit of {limit}", field="body"
            )
        return limit

    async def _principal(self, scope: Scope) -> Principal:
        client = scope.get("client")
        address = client[0] if client else "unknown"
        self.failures.check(address)
        header = Headers(scope=scope).get("authorization", "")
        scheme, _, plain = header.partition(" ")
        who = None
        if scheme.lower() == "bearer" and plain.strip():
            sessions = self.state.read_sessions  # type: ignore[attr-defined]

            def lookup() -> Principal | None:
                with sessions() as session, session.begin():
                    return authenticate(session, plain.strip())

            who = await run_in_threadpool(lookup)
        if who is None:
            self.failures.take(address)
            if not plain.strip():
                raise Unauthorized(
                    "send an access key: Authorization: Bearer <key>", field="authorization"
                )
            raise Unauthorized(
                "the access key is not valid (unknown or revoked)", field="authorization"
            )
        assert who.key_id is not None
        self.state.rate_limiter.take(who.key_id)  # type: ignore[attr-defined]
        return who


def _limited(receive: Receive, limit: int) -> Receive:
    """``receive`` that refuses a body growing past ``limit`` bytes (413)."""
    size = 0

    async def receive_limited() -> Message:
        nonlocal size
        message = await receive()
        if message["type"] == "http.request":
            size += len(message.get("body", b""))
            if size > limit:
                raise HTTPException(413, f"body exceeds the limit of {limit} bytes")
        return message

    return receive_limited


# Declared by every check for the OpenAPI document's security scheme; the gate read the header.
Bearer = Annotated[HTTPAuthorizationCredentials | None, Depends(bearer)]


def _principal(request: Request) -> Principal:
    settings: Settings = request.app.state.settings
    if settings.auth_mode == "open":
        return OPEN
    who: Principal | None = getattr(request.state, "principal", None)
    if who is None:  # a keyed route outside the gate's prefixes: refuse rather than serve
        raise Unauthorized("send an access key: Authorization: Bearer <key>", field="authorization")
    return who


def _granted(who: Principal, needed: tuple[str, ...]) -> Principal:
    if not any(who.grants(n) for n in needed):
        raise Forbidden(f"a '{who.role}' key may not {' or '.join(needed)}", field="authorization")
    return who


# Each check is one dependency, not a chain: FastAPI solves every level of a chain on every
# request, and ingest routes take a fleet's every sample.
def role(
    needed: str,
) -> Callable[[Request, HTTPAuthorizationCredentials | None], Awaitable[Principal]]:
    async def check(request: Request, _: Bearer) -> Principal:
        return _granted(_principal(request), (needed,))

    return check


def rail_role(
    *needed: str,
) -> Callable[[Request, str, HTTPAuthorizationCredentials | None], Awaitable[Principal]]:
    """A key whose role grants one of ``needed``, limited to the path's rail."""

    async def check(request: Request, rail_id: Annotated[str, Path()], _: Bearer) -> Principal:
        who = _granted(_principal(request), needed)
        if not who.may_use(rail_id):
            raise Forbidden(f"this key may not use rail '{rail_id}'", field="rail_id")
        return who

    return check


Reader = Annotated[Principal, Depends(role("read"))]
Operator = Annotated[Principal, Depends(role("operate"))]
Admin = Annotated[Principal, Depends(role("admin"))]
RailReader = Annotated[Principal, Depends(rail_role("read"))]
may_ingest = rail_role("ingest")  # also called as is by the samples route's lane
RailIngester = Annotated[Principal, Depends(may_ingest)]
RailOperator = Annotated[Principal, Depends(rail_role("operate"))]
RailAdmin = Annotated[Principal, Depends(rail_role("admin"))]
# Captures come from the rack that posts samples or from an operator at the bench.
RailUploader = Annotated[Principal, Depends(rail_role("ingest", "operate"))]
