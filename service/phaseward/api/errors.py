"""One handler per error family, all rendering ``{"error", "detail", "field"}``, and
``CatchAll`` for the unexpected."""

from __future__ import annotations

import logging
import math
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from pydantic import ValidationError
from sqlalchemy.exc import DBAPIError, InternalError, OperationalError
from starlette.exceptions import HTTPException
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from phaseward.api.schemas.common import ErrorBody
from phaseward.errors import PhasewardError, TooManyRequests, Unauthorized

_LOCATION_PREFIXES = ("body", "query", "path", "header")


def field_path(loc: tuple[Any, ...]) -> str:
    """('body', 0, 'phases', 1, 'index') -> '[0].phases[1].index'."""
    parts = list(loc)
    if parts and parts[0] in _LOCATION_PREFIXES:
        parts = parts[1:]
    out = ""
    for part in parts:
        if isinstance(part, int):
            out += f"[{part}]"
        elif isinstance(part, str) and part.startswith(("function-", "union[")):
            continue  # pydantic's internal validator names say nothing to a client
        else:
            out += f".{part}" if out else str(part)
    return out or "body"


def _render(status: int, error: str, detail: str, field: str | None, **extra: Any) -> JSONResponse:
    body = ErrorBody(error=error, detail=detail, field=field).model_dump()
    return JSONResponse(status_code=status, content={**body, **extra})


def validation_response(errors: list[Any]) -> JSONResponse:
    first = errors[0]
    field = field_path(tuple(first["loc"]))
    items = [{"field": field_path(tuple(e["loc"])), "detail": str(e["msg"])} for e in errors[:50]]
    return _render(422, "invalid_input", f"{field}: {first['msg']}", field, errors=items)


def error_response(err: PhasewardError) -> JSONResponse:
    response = _render(err.status_code, err.error, err.detail, err.field)
    if isinstance(err, Unauthorized):
        response.headers["WWW-Authenticate"] = 'Bearer realm="phaseward"'
    if isinstance(err, TooManyRequests):
        response.headers["Retry-After"] = str(max(1, math.ceil(err.retry_after_s)))
    return response


class CatchAll:
    """An exception no handler knows becomes a logged 500 in the same JSON shape, and the
    server keeps the connection: left to the framework it would answer plain text and the
    server would drop the connection, resetting the client's next request on it. (Once a
    streamed response has begun there is nothing left to answer with: that one is re-raised.)
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def watch(message: Message) -> None:
            nonlocal started
            started = started or message["type"] == "http.response.start"
            await send(message)

        try:
            await self.app(scope, receive, watch)
        except Exception:
            if started:
                raise
            logging.getLogger(__name__).exception("unexpected error")
            response = _render(500, "internal_error", "an unexpected error; see the server log "
                               "for this request's id (X-Request-ID)", None)  # fmt: skip
            await response(scope, receive, send)


def install(app: FastAPI) -> None:
    @app.exception_handler(PhasewardError)
    async def _ours(_: Request, err: PhasewardError) -> JSONResponse:
        return error_response(err)

    @app.exception_handler(HTTPException)
    async def _http(_: Request, err: HTTPException) -> JSONResponse:
        # The framework's own refusals (a body it cannot parse, an unknown path, a method the
        # path lacks) in the same shape as ours, not as a bare {"detail"}.
        error = _HTTP_ERRORS.get(err.status_code, "http_error")
        field = "body" if err.status_code in (400, 413) else None
        response = _render(err.status_code, error, str(err.detail), field)
        response.headers.update(err.headers or {})
        return response

    @app.exception_handler(RequestValidationError)
    async def _request(_: Request, err: RequestValidationError) -> JSONResponse:
        return validation_response(list(err.errors()))

    @app.exception_handler(ValidationError)
    async def _model(_: Request, err: ValidationError) -> JSONResponse:
        return validation_response(list(err.errors()))

    @app.exception_handler(OperationalError)
    async def _database(_: Request, err: OperationalError) -> JSONResponse:
        return _unavailable(err)

    @app.exception_handler(InternalError)
    async def _internal(_: Request, err: InternalError) -> JSONResponse:
        # PostgreSQL refuses writes to a read-only database (a standby, or
        # default_transaction_read_only) with SQLSTATE 25006, which the driver files under
        # InternalError; any other InternalError stays a 500.
        if getattr(err.orig, "sqlstate", None) != READ_ONLY_SQLSTATE:
            raise err
        return _unavailable(err)


_HTTP_ERRORS = {
    400: "bad_request",
    404: "not_found",
    405: "method_not_allowed",
    413: "payload_too_large",
}
READ_ONLY_SQLSTATE = "25006"  # read_only_sql_transaction


def _unavailable(err: DBAPIError) -> JSONResponse:
    text = str(err.orig) if err.orig is not None else str(err)
    return _render(503, "service_unavailable", f"database unavailable: {text}", None)


def links(param: str, *targets: str) -> dict[str, Any]:
    """OpenAPI links from a created resource's ``id`` to the operations that take it as
    ``param`` (targets as "METHOD /path"), so clients and stateful fuzzing can follow them."""
    out = {}
    for target in targets:
        method, path = target.split(" ", 1)
        name = method.title() + "".join(p.title() for p in path.replace(".", "/").split("/")
                                        if p and not p.startswith("{"))  # fmt: skip
        ref = "#/paths/" + path.replace("~", "~0").replace("/", "~1") + "/" + method.lower()
        out[name] = {"operationRef": ref, "parameters": {param: "$response.body#/id"}}
    return {"links": out}


ERROR_RESPONSES: dict[int | str, dict[str, Any]] = {
    code: {"model": ErrorBody, "description": text}
    for code, text in {
        400: "Malformed body",
        401: "No valid access key",
        403: "The key's role or rails do not allow this",
        404: "Unknown rail or event",
        409: "Conflict with what is stored",
        413: "Body or batch too large",
        415: "Unsupported content type",
        422: "A value that cannot be right; `field` names it",
        429: "Over the key's rate; see Retry-After",
        500: "An unexpected error (logged with the request's id)",
        503: "Database unavailable",
    }.items()
}
