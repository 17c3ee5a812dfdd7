"""Health, readiness, metrics in the OpenMetrics text format, and request ids on every log
line (structured JSON logs)."""

from __future__ import annotations

import contextvars
import json
import logging
import secrets
import threading
import time
from typing import Any

from fastapi import APIRouter, FastAPI, Request, Response
from fastapi.concurrency import run_in_threadpool
from sqlalchemy import text
from sqlalchemy.orm import Session, sessionmaker
from starlette.datastructures import Headers, MutableHeaders
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from phaseward import __version__
from phaseward.api.auth import Reader
from phaseward.api.errors import ERROR_RESPONSES
from phaseward.errors import ServiceUnavailable
from phaseward.store import state as state_store
from phaseward.store.db import is_migrated

request_id: contextvars.ContextVar[str] = contextvars.ContextVar("request_id", default="-")
access_log = logging.getLogger("phaseward.access")
OPENMETRICS = "application/openmetrics-text; version=1.0.0; charset=utf-8"
BUCKETS_S = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0)
RAIL_CONDITIONS = ("nominal", "exposed", "degraded", "overloaded", "down")


class Metrics:
    """Counters and latency histograms of this process (each replica reports its own)."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.samples_accepted = 0
        self.samples_rejected = 0
        self.batches_rejected = 0
        self._hist: dict[tuple[str, str, str], list[float]] = {}  # bucket counts, sum, count

    def count_samples(self, *, accepted: int = 0, rejected: int = 0) -> None:
        with self._lock:
            self.samples_accepted += accepted
            self.samples_rejected += rejected
            self.batches_rejected += rejected > 0  # a refused batch holds at least one sample

    def observe(self, method: str, route: str, status: int, seconds: float) -> None:
        key = (method, route, f"{status // 100}xx")
        with self._lock:
            h = self._hist.setdefault(key, [0.0] * (len(BUCKETS_S) + 2))
            for i, edge in enumerate(BUCKETS_S):
                if seconds <= edge:
                    h[i] += 1
            h[-2] += seconds
            h[-1] += 1

    def render(self, rails: list[dict[str, Any]]) -> str:
        out = [
            "# TYPE phaseward_samples_accepted counter",
            "# HELP phaseward_samples_accepted Samples stored by this process.",
            f"phaseward_samples_accepted_total {self.samples_accepted}",
            "# TYPE phaseward_samples_rejected counter",
            "# HELP phaseward_samples_rejected Samples in batches this process refused.",
            f"phaseward_samples_rejected_total {self.samples_rejected}",
            "# TYPE phaseward_batches_rejected counter",
            "# HELP phaseward_batches_rejected Batches this process refused (each one counted, "
            "while events report them per episode).",
            f"phaseward_batches_rejected_total {self.batches_rejected}",
            "# TYPE phaseward_request_seconds histogram",
            "# UNIT phaseward_request_seconds seconds",
            "# HELP phaseward_request_seconds Request latency by route.",
        ]
        with self._lock:
            hist = {k: list(v) for k, v in self._hist.items()}
        for (method, route, status), h in sorted(hist.items()):
            labels = f'method="{method}",route="{_esc(route)}",status="{status}"'
            for edge, count in zip(BUCKETS_S, h, strict=False):
                out.append(f'phaseward_request_seconds_bucket{{{labels},le="{edge}"}} {count:g}')
            out.append(f'phaseward_request_seconds_bucket{{{labels},le="+Inf"}} {h[-1]:g}')
            out.append(f"phaseward_request_seconds_sum{{{labels}}} {h[-2]:.6f}")
            out.append(f"phaseward_request_seconds_count{{{labels}}} {h[-1]:g}")
        out += [
            "# TYPE phaseward_rail_condition stateset",
            "# HELP phaseward_rail_condition The rail's condition after its newest sample.",
        ]
        for r in rails:
            for c in RAIL_CONDITIONS:
                value = int(r["condition"] == c)
                out.append(
                    f'phaseward_rail_condition{{rail="{_esc(r["rail"])}",'
                    f'phaseward_rail_condition="{c}"}} {value}'
                )
        for name, unit, field, help_text in (
            ("capacity", "amperes", "capacity_a", "What the active phases can deliver."),
            ("load", "amperes", "load_a", "The present total output current."),
            (
                "thermal_margin",
                "kelvin",
                "margin_to_limit_k",
                "Junction limit minus the hottest estimate.",
            ),
        ):
            metric = f"phaseward_rail_{name}_{unit}"
            out += [
                f"# TYPE {metric} gauge",
                f"# UNIT {metric} {unit}",
                f"# HELP {metric} {help_text}",
            ]
            for r in rails:
                if r[field] is not None:
                    out.append(f'{metric}{{rail="{_esc(r["rail"])}"}} {r[field]:.6g}')
        out.append("# EOF")
        return "\n".join(out) + "\n"


def _esc(value: str) -> str:
    return value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


def _rails(sessions: sessionmaker[Session]) -> list[dict[str, Any]]:
    with sessions() as session, session.begin():
        rows = state_store.all_states(session)
        out = []
        for row in rows:
            verdict = row.state.get("rail", {})
            margin = verdict.get("margin_to_limit_k")
            out.append({
                "rail": row.rail_id,
                "condition": verdict.get("condition"),
                "capacity_a": verdict.get("capacity_a"),
                "load_a": verdict.get("load_a"),
                "margin_to_limit_k": margin,
            })  # fmt: skip
        return out


class JsonLines(logging.Formatter):
    """One JSON object a line, with the request id of the request being served."""

    def format(self, record: logging.LogRecord) -> str:
        line: dict[str, Any] = {
            "time": self.formatTime(record, "%Y-%m-%dT%H:%M:%S"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "request_id": request_id.get(),
            "message": record.getMessage(),
        }
        line |= getattr(record, "fields", {})
        if record.exc_info:
            line["error"] = self.formatException(record.exc_info)
        return json.dumps(line, default=str)


def configure_logging(level: str) -> None:
    handler = logging.StreamHandler()
    handler.setFormatter(JsonLines())
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    for name in ("uvicorn", "uvicorn.error", "uvicorn.access"):
        logging.getLogger(name).handlers[:] = []
        logging.getLogger(name).propagate = True
    logging.getLogger("uvicorn.access").disabled = True  # our access line carries the id


def install(app: FastAPI) -> None:
    app.add_middleware(RequestLog, metrics=app.state.metrics)


class RequestLog:
    """A request id (the client's X-Request-ID or a new one) on every log line and on the
    response, a latency histogram per route, and one access line per request.

    Plain ASGI rather than an ``@app.middleware`` function: that wrapper runs each request
    through an extra task and memory stream, a cost every ingest request would pay."""

    def __init__(self, app: ASGIApp, metrics: Metrics) -> None:
        self.app, self.metrics = app, metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        given = Headers(scope=scope).get("x-request-id")
        rid = (given or secrets.token_hex(8))[:64]  # 64 random bits, a uuid4's cost / 4
        started = time.perf_counter()

        async def send_with_id(message: Message) -> None:
            if message["type"] == "http.response.start":
                MutableHeaders(scope=message)["X-Request-ID"] = rid
                self._log(scope, message["status"], time.perf_counter() - started)
            await send(message)

        token = request_id.set(rid)
        try:
            await self.app(scope, receive, send_with_id)
        finally:
            request_id.reset(token)

    def _log(self, scope: Scope, status: int, elapsed: float) -> None:
        template = getattr(scope.get("route"), "path", "unmatched")
        self.metrics.observe(scope["method"], template, status, elapsed)
        access_log.info(
            "%s %s %s", scope["method"], template, status,
            extra={"fields": {"status": status, "ms": round(elapsed * 1e3, 3),
                              "path": scope["path"]}},
        )  # fmt: skip


router = APIRouter(tags=["meta"])


@router.get("/healthz")
def healthz() -> dict[str, str]:
    """The process is alive."""
    return {"status": "ok", "version": __version__}


_NOT_READY = ERROR_RESPONSES[503] | {"description": "database unreachable or not migrated"}


@router.get("/readyz", responses={503: _NOT_READY})
async def readyz(request: Request) -> dict[str, str]:
    """The database answers and holds the newest schema."""
    engine = request.app.state.engine

    def check() -> bool:
        with engine.connect() as conn:
            conn.execute(text("SELECT 1"))
            return is_migrated(conn)

    try:
        migrated = await run_in_threadpool(check)
    except Exception as err:  # any failure to reach the database means not ready
        raise ServiceUnavailable(f"database unreachable: {type(err).__name__}") from err
    if not migrated:
        raise ServiceUnavailable("database schema is not at the newest migration")
    return {"status": "ready"}


@router.get(
    "/metrics",
    response_class=Response,
    responses={
        200: {"content": {OPENMETRICS: {"schema": {"type": "string"}}}},
        **{code: ERROR_RESPONSES[code] for code in (401, 403, 429, 500, 503)},
    },
)
async def metrics_text(request: Request, who: Reader) -> Response:
    """Counters, latency histograms and per-rail gauges in the OpenMetrics text format (a
    read key; a key limited to rails sees only those rails' gauges)."""
    rails = [
        r
        for r in await run_in_threadpool(_rails, request.app.state.read_sessions)
        if who.may_use(r["rail"])
    ]
    return Response(request.app.state.metrics.render(rails), media_type=OPENMETRICS)
