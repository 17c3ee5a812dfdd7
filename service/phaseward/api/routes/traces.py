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
from phaseward.api.routes.samples import NDJSON, parse_items
from phaseward.api.schemas.traces import TraceOut, parse_csv, parse_samples
from phaseward.errors import InvalidInput, UnsupportedMediaType
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
    array of samples (up to ``max_body_bytes``); ``text/plain`` is told apart by content. The
    body is spooled to a temporary file as it arrives and parsed (CSV row by row) off the
    event loop.

    CSV: a header naming ``time_s`` (s), ``i0_a`` .. ``i{N-1}_a`` (A) and optionally ``vin_v``
    (V), ``t{k}_c`` (degC) and ``iso{k}`` (1 = phase isolated), then one row per sample; an
    empty or ``nan`` cell is no reading (``vin_v`` and temperatures only). Samples: the ingest
    format, ``breaker_tripped`` / ``driver_disabled`` mark a phase isolated. README: "Rehearsal
    and calibration formats"."""
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media not in ("text/csv", "text/plain", NDJSON, "application/json"):
        raise UnsupportedMediaType(
            f"send text/csv, {NDJSON}, application/json or text/plain", field="content-type"
        )
    with tempfile.SpooledTemporaryFile(max_size=SPOOL_BYTES) as spool:
        async for chunk in request.stream():  # the gate holds it to its limit
            spool.write(chunk)
        spool.seek(0)
        if media == "text/plain":
            head = spool.read(4096).decode("utf-8", "replace").lstrip("\ufeff \t\r\n")[:1]
            spool.seek(0)
            media = "application/json" if head == "[" else NDJSON if head == "{" else "text/csv"
        if media == "text/csv":
            text = io.TextIOWrapper(spool, encoding="utf-8-sig", newline="")
            trace = await run_in_threadpool(
                _csv, text, name=name, max_samples=settings.max_trace_samples
            )
        else:
            body = spool.read()

            def parse() -> TraceArrays:
                items = parse_items(body, media, max_items=settings.max_trace_samples)
                return parse_samples(items, name=name)

            trace = await run_in_threadpool(parse)
    trace_id = await run_in_threadpool(traces.keep, sessions, trace)
    return _out(trace_id, trace)


def _csv(text: io.TextIOWrapper, *, name: str, max_samples: int) -> TraceArrays:
    try:
        return parse_csv(text, name=name, max_samples=max_samples)
    except UnicodeDecodeError as bad:
        raise InvalidInput(f"the CSV is not UTF-8 (byte {bad.start})", field="body") from None


@router.get("/{trace_id}")
def get_trace(trace_id: RowId, session: ReadSessionDep, _: Operator) -> TraceOut:
    return _out(trace_id, traces.load(session, trace_id))
