"""Telemetry ingest: JSON object, JSON array, NDJSON, columnar JSON or CSV, all-or-nothing
per request (the content type chooses the form)."""

from __future__ import annotations

import json
import re
from typing import Annotated, Any

import numpy as np
import numpy.typing as npt
from fastapi import APIRouter, Query, Request, Response
from fastapi.concurrency import run_in_threadpool
from pydantic import ValidationError
from sqlalchemy.orm import Session, sessionmaker
from starlette.routing import Match, Route
from starlette.types import Receive, Scope, Send

from phaseward.api.auth import RailIngester, RailReader, may_ingest
from phaseward.api.deps import Clock, ReadSessionDep, SettingsDep
from phaseward.api.errors import ERROR_RESPONSES, field_path
from phaseward.api.group_commit import GroupCommit
from phaseward.api.observability import Metrics
from phaseward.api.routes.rails import RAIL_ID_PATTERN, RailId
from phaseward.api.schemas.columns import (
    COLUMNS_JSON,
    COLUMNS_SCHEMA,
    CSV_SCHEMA,
    Refusal,
    parse_columns,
)
from phaseward.api.schemas.columns_csv import CSV, parse_csv
from phaseward.api.schemas.samples import (
    BODY_SCHEMA,
    SAMPLES,
    HistoryOut,
    IngestOut,
    SampleWindow,
    to_incoming,
)
from phaseward.errors import (
    BadRequest,
    InvalidInput,
    PayloadTooLarge,
    PhasewardError,
    UnsupportedMediaType,
)
from phaseward.monitor import rails as rail_service
from phaseward.monitor import retention
from phaseward.monitor.rejections import record_rejection
from phaseward.monitor.telemetry import IncomingSamples
from phaseward.settings import Settings
from phaseward.store import samples as sample_store

router = APIRouter(prefix="/v1/rails", tags=["telemetry"], responses=ERROR_RESPONSES)

NDJSON = "application/x-ndjson"
_BODY_DOC = {
    "requestBody": {
        "required": True,
        "content": {
            "application/json": {"schema": BODY_SCHEMA},
            NDJSON: {"schema": BODY_SCHEMA},
            COLUMNS_JSON: {"schema": COLUMNS_SCHEMA},
            CSV: {"schema": CSV_SCHEMA},
        },
    }
}


async def read_limited(request: Request, limit: int) -> bytes:
    """The body, refused with 413 as soon as it passes ``limit`` (never buffered whole)."""
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise PayloadTooLarge(
            f"body of {declared} bytes exceeds the limit of {limit}", field="body"
        )
    chunks: list[bytes] = []
    size = 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise PayloadTooLarge(f"body exceeds the limit of {limit} bytes", field="body")
        chunks.append(chunk)
    return b"".join(chunks)


def _too_deep(where: str) -> BadRequest:
    """JSON nested deeper than the parser's recursion limit (no sample nests more than three
    levels): a client error, not the parser's crash."""
    return BadRequest(f"{where} is JSON nested too deeply to be samples", field=where)


def parse_items(body: bytes, content_type: str, *, max_items: int) -> list[Any]:
    """The samples of a JSON object, a JSON array or NDJSON lines, at most ``max_items``."""
    media = content_type.split(";")[0].strip().lower()
    if media == NDJSON:
        items = []
        for number, line in enumerate(body.splitlines(), start=1):
            if not line.strip():
                continue
            try:
                items.append(json.loads(line))
            except ValueError as err:
                raise BadRequest(
                    f"NDJSON line {number} is not JSON: {err}", field=f"line {number}"
                ) from err
            except RecursionError:
                raise _too_deep(f"line {number}") from None
    elif media in ("application/json", ""):
        try:
            doc = json.loads(body)
        except ValueError as err:
            raise BadRequest(f"body is not JSON: {err}", field="body") from err
        except RecursionError:
            raise _too_deep("body") from None
        items = doc if isinstance(doc, list) else [doc]
    else:
        raise UnsupportedMediaType(
            f"send application/json or {NDJSON}, not {media}", field="content-type"
        )
    if not items:
        raise BadRequest("no samples in the body", field="body")
    if len(items) > max_items:
        raise PayloadTooLarge(f"{len(items)} samples exceed the limit of {max_items}", field="body")
    return items


def ahead_of_clock(
    incoming: IncomingSamples, *, now_s: float, skew_s: float
) -> InvalidInput | None:
    """The refusal of the first sample dated more than ``skew_s`` ahead of ``now_s``, if any
    (the clock policy: one wrong clock must not freeze a rail's live state)."""
    ahead = np.nonzero(incoming.t_s > now_s + skew_s)[0]
    if not ahead.size:
        return None
    k = int(ahead[0])
    return InvalidInput(
        f"sample dated {incoming.t_s[k] - now_s:.1f} s ahead of this server's clock; at most "
        f"{skew_s:g} s of clock skew is allowed (PHASEWARD_FUTURE_SKEW_S)",
        field=incoming.cell(k, None, "time"),
    )


def read_samples(body: bytes, content_type: str, *, max_items: int) -> IncomingSamples:
    """The body's samples in the monitor's long form, whatever its form; a ``Refusal`` names
    the first bad item or cell."""
    media = content_type.split(";")[0].strip().lower()
    if media == COLUMNS_JSON:
        return parse_columns(body, max_items=max_items)
    if media == CSV:
        return parse_csv(body, max_items=max_items)
    if media not in ("application/json", NDJSON, ""):
        raise UnsupportedMediaType(
            f"send application/json, {NDJSON}, {COLUMNS_JSON} or {CSV}, not {media}",
            field="content-type",
        )
    raw = parse_items(body, content_type, max_items=max_items)
    try:
        return to_incoming(SAMPLES.validate_python(raw))
    except ValidationError as err:
        first = err.errors()[0]
        refusal = InvalidInput(str(first["msg"]), field=field_path(tuple(first["loc"])))
        raise Refusal(refusal, len(raw), answer=err) from None


@router.post("/{rail_id}/samples", openapi_extra=_BODY_DOC)
async def post_samples(rail_id: RailId, request: Request, _: RailIngester) -> IngestOut:
    """Store samples and advance the rail's live state. The answer comes after the commit.
    On a server with ``PHASEWARD_JUDGE_WITHIN_S`` set, routine samples may be stored and left
    to be judged with the rail's next ones (``waiting`` counts them; ``condition`` is then the
    last judged sample's); anything out of the routine is judged before the answer.
    A batch with a bad item or cell, or a sample dated beyond the allowed clock skew, is
    refused whole (422 naming the first bad one). Send sample objects (``application/json``,
    ``application/x-ndjson``), or for bulk the columnar JSON
    (``application/vnd.phaseward.columns+json``) or CSV (``text/csv``) forms, which are
    checked as arrays: the same rules and bounds, a fraction of the cost per sample."""
    # Looked up here, not as dependencies: the lane (_IngestLane) calls this function as is.
    state = request.app.state
    settings: Settings = state.settings
    sessions: sessionmaker[Session] = state.sessions
    clock: Clock = state.clock
    metrics: Metrics = state.metrics
    body = await read_limited(request, settings.max_body_bytes)
    try:
        incoming = read_samples(
            body, request.headers.get("content-type", ""), max_items=settings.max_batch_samples
        )
        ahead = ahead_of_clock(incoming, now_s=clock(), skew_s=settings.future_skew_s)
        if ahead is not None:
            raise Refusal(ahead, incoming.n)
    except Refusal as refused:
        await run_in_threadpool(
            record_rejection, sessions, rail_id, samples=refused.samples, error=refused.error
        )
        metrics.count_samples(rejected=refused.samples)
        raise refused.answer from None
    group_commit: GroupCommit = state.group_commit
    try:
        result = await group_commit.submit(rail_id, incoming)
    except PhasewardError:
        metrics.count_samples(rejected=incoming.n)
        raise
    metrics.count_samples(accepted=result.stored)
    return IngestOut(
        stored=result.stored, duplicates=result.duplicates, late=result.late,
        condition=result.condition, version=result.version, waiting=result.waiting,
    )  # fmt: skip


class _IngestLane:
    """``post_samples`` served without FastAPI's per-request machinery (dependency solving,
    the route's request and response wrappers, checking the answer against its model), which
    cost a fleet's single-sample requests more CPU than the sample's parsing and storing. Same
    function, same access check, same errors: what it raises reaches the app's exception
    handlers as from any route. The FastAPI route stays for the OpenAPI document and answers
    what the lane does not take (a rail id the path pattern refuses gets its 422 there)."""

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        request = Request(scope, receive)
        rail_id: str = scope["path_params"]["rail_id"]
        answer = await post_samples(rail_id, request, await may_ingest(request, rail_id, None))
        body = answer.model_dump_json().encode()
        await Response(body, media_type="application/json")(scope, receive, send)


class _LaneRoute(Route):
    """Matches only a POST whose rail id the path pattern takes; names itself to the request
    log as the route it stands in for."""

    def matches(self, scope: Scope) -> tuple[Match, Scope]:
        match, child = super().matches(scope)
        if match is not Match.FULL or not _RAIL_ID.fullmatch(child["path_params"]["rail_id"]):
            return Match.NONE, {}
        return match, {**child, "route": self}


_RAIL_ID = re.compile(RAIL_ID_PATTERN)
LANE = _LaneRoute(
    "/v1/rails/{rail_id}/samples", _IngestLane(), methods=["POST"], include_in_schema=False
)


def _nullable(a: npt.NDArray[np.float64]) -> list[Any]:
    """``a`` as (nested) lists with None where it is not finite, converted by numpy: a Python
    loop per value took most of the time of a window (45 of 80 ms for an hour of 12 phases)."""
    values = a.astype(object)
    values[~np.isfinite(a)] = None
    out: list[Any] = values.tolist()
    return out


@router.get("/{rail_id}/samples")
def get_samples(
    rail_id: RailId,
    session: ReadSessionDep,
    settings: SettingsDep,
    _: RailReader,
    since: Annotated[float, Query(ge=0, description="epoch seconds, inclusive")],
    until: Annotated[float, Query(gt=0, description="epoch seconds, exclusive")],
    limit: Annotated[int, Query(ge=1, le=100_000)] = 1000,
) -> SampleWindow:
    """A time window of stored samples (a history window reads only its own rows)."""
    rail_service.get(session, rail_id)
    size = min(limit, settings.max_page_size)
    rows = sample_store.window(session, rail_id, start_s=since, end_s=until, limit=size + 1)
    n = min(len(rows.seq), size)
    return SampleWindow(
        rail_id=rail_id, count=n, truncated=len(rows.seq) > size,
        seq=rows.seq[:n].tolist(), time_s=rows.t_s[:n].tolist(), version=rows.version[:n].tolist(),
        phase_count=rows.phase_count[:n].tolist(),
        vin_v=rows.vin_v[:n].tolist(), vout_v=rows.vout_v[:n].tolist(),
        iout_a=_nullable(rows.iout_a[:n]), iin_a=_nullable(rows.iin_a[:n]),
        ambient_c=_nullable(rows.ambient_c[:n]),
        current_a=_nullable(rows.current_a[:n]), temp_c=_nullable(rows.temp_c[:n]),
        flags=rows.flags[:n].astype(int).tolist(),
    )  # fmt: skip


@router.get("/{rail_id}/history")
def get_history(
    rail_id: RailId,
    session: ReadSessionDep,
    settings: SettingsDep,
    _: RailReader,
    since: Annotated[float, Query(ge=0, description="epoch seconds, inclusive")],
    until: Annotated[float, Query(gt=0, description="epoch seconds, exclusive")],
) -> HistoryOut:
    """Minimum, maximum and mean per interval: from samples, or from what retention kept of
    them once they were reduced (``reduced``)."""
    return HistoryOut.model_validate(
        retention.history(
            session, rail_id, start_s=since, end_s=until, interval_s=settings.summary_interval_s
        )
    )
