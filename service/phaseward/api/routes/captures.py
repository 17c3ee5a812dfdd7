"""Fault captures: the waveform recorded around a trip, attached to its isolation event."""

from __future__ import annotations

import tempfile
from typing import IO

from fastapi import APIRouter, Request, status
from fastapi.concurrency import run_in_threadpool

from phaseward.api.auth import RailReader, RailUploader
from phaseward.api.deps import ReadSessionDep, SessionsDep, SettingsDep
from phaseward.api.errors import ERROR_RESPONSES
from phaseward.api.routes.rails import RailId, RowId
from phaseward.api.schemas.captures import MEDIA, CaptureOut, capture_format, parse_capture
from phaseward.errors import PayloadTooLarge
from phaseward.monitor import fault_class
from phaseward.monitor.fault_class import CaptureResult

router = APIRouter(prefix="/v1/rails", tags=["events"], responses=ERROR_RESPONSES)
SPOOL_BYTES = 1024 * 1024  # an upload stays in memory up to this, then goes to a temporary file

_BODY_DOC = {
    "requestBody": {
        "required": True,
        "content": {media: {"schema": {"type": "string", "format": "binary"}} for media in MEDIA},
    }
}


async def spool(request: Request, limit: int) -> IO[bytes]:
    """The body in a temporary file (memory up to SPOOL_BYTES), refused with 413 as soon as it
    passes ``limit`` bytes: memory stays bounded whatever the upload's size."""
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise PayloadTooLarge(
            f"body of {declared} bytes exceeds the limit of {limit}", field="body"
        )
    file = tempfile.SpooledTemporaryFile(max_size=SPOOL_BYTES)  # noqa: SIM115 (returned open)
    size = 0
    try:
        async for chunk in request.stream():
            size += len(chunk)
            if size > limit:
                raise PayloadTooLarge(f"body exceeds the limit of {limit} bytes", field="body")
            file.write(chunk)
    except BaseException:
        file.close()
        raise
    file.seek(0)
    return file


def _out(result: CaptureResult) -> CaptureOut:
    return CaptureOut(
        id=result.capture_id, event_id=result.event_id, rail_id=result.rail_id,
        phase=result.phase, n_samples=result.n_samples, n_phases=result.n_phases,
        channels=result.channels, signature=result.signature,
    )  # fmt: skip


@router.post(
    "/{rail_id}/events/{event_id}/capture",
    status_code=status.HTTP_201_CREATED,
    openapi_extra=_BODY_DOC,
)
async def upload_capture(
    rail_id: RailId,
    event_id: RowId,
    request: Request,
    sessions: SessionsDep,
    settings: SettingsDep,
    _: RailUploader,
) -> CaptureOut:
    """Attach the waveform recorded around the trip of a ``phase.isolated`` event (CSV,
    ``.npy`` or ``.npz``; columns in the README) and classify the fault from it: the event then
    shows the class, its confidence, the evidence used and the reason."""
    kind = capture_format(request.headers.get("content-type", ""))
    body = await spool(request, settings.max_capture_bytes)

    def store() -> CaptureResult:
        with body:
            capture = parse_capture(
                body, kind=kind, size_limit=settings.max_capture_bytes,
                max_samples=settings.max_capture_samples,
            )  # fmt: skip
        return fault_class.attach_capture(
            sessions, rail_id=rail_id, event_id=event_id, capture=capture
        )

    return _out(await run_in_threadpool(store))


@router.get("/{rail_id}/events/{event_id}/capture")
def get_capture(
    rail_id: RailId, event_id: RowId, session: ReadSessionDep, _: RailReader
) -> CaptureOut:
    """The capture attached to an event: its size, channels and the answer it gave."""
    return _out(fault_class.capture_of(session, rail_id, event_id))
