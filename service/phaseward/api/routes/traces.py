"""Traces: recordings uploaded for rehearsals."""

from __future__ import annotations

import io
import tempfile
from typing import Annotated

from fastapi import APIRouter, Query, Request, status
from fastapi.concurrency import run_in_threadpool

from phaseward.api.auth import Operator
from phaseward.api.deps import ReadSessionDep, SessionsDep, SettingsDep
from phaseward.api.errors import ERROR_RESPONSES, links
from phaseward.api.routes.rails import RowId
from phaseward.api.routes.samples import NDJSON, parse_items, read_limited
from phaseward.api.schemas.traces import TraceOut, parse_csv, parse_samples
from phaseward.errors import UnsupportedMediaType
from phaseward.monitor import traces
from phaseward.store.traces import TraceArrays

router = APIRouter(prefix="/v1/traces", tags=["rehearsal"], responses=ERROR_RESPONSES)
SPOOL_BYTES = 1 << 20  # a CSV body beyond this waits on disk for its parse


def _out(trace_id: int, trace: TraceArrays) -> TraceOut:
    return TraceOut(
        id=trace_id, name=trace.name, n_samples=int(trace.t_s.size),
        n_phases=int(trace.current_a.shape[1]), start_s=float(trace.t_s[0]),
        end_s=float(trace.t_s[-1]),
    )  # fmt: skip


@router.post(
    "",
    status_code=status.HTTP_201_CREATED,
    responses={201: links("trace_id", "GET /v1/traces/{trace_id}")},
)
async def upload_trace(
    request: Request,
    sessions: SessionsDep,
    settings: SettingsDep,
    _: Operator,
    name: Annotated[str, Query(min_length=1, max_length=200)] = "trace",
) -> TraceOut:
    """Upload a recording as CSV (``text/csv``, up to ``max_trace_bytes``), NDJSON or a JSON
    array of samples (up to ``max_body_bytes``). A CSV body is spooled to a temporary file as
    it arrives and parsed row by row; every parse runs off the event loop."""
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media == "text/csv":
        with tempfile.SpooledTemporaryFile(max_size=SPOOL_BYTES) as spool:
            async for chunk in request.stream():  # the gate holds it to max_trace_bytes
                spool.write(chunk)
            spool.seek(0)
            text = io.TextIOWrapper(spool, encoding="utf-8", errors="replace", newline="")
            trace = await run_in_threadpool(
                parse_csv, text, name=name, max_samples=settings.max_trace_samples
            )
    elif media in (NDJSON, "application/json"):
        body = await read_limited(request, settings.max_body_bytes)

        def parse() -> TraceArrays:
            items = parse_items(body, media, max_items=settings.max_trace_samples)
            return parse_samples(items, name=name)

        trace = await run_in_threadpool(parse)
    else:
        raise UnsupportedMediaType(
            f"send text/csv, {NDJSON} or application/json", field="content-type"
        )
    trace_id = await run_in_threadpool(traces.keep, sessions, trace)
    return _out(trace_id, trace)


@router.get("/{trace_id}")
def get_trace(trace_id: RowId, session: ReadSessionDep, _: Operator) -> TraceOut:
    return _out(trace_id, traces.load(session, trace_id))
