"""Rail definitions and the operator's status view."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path, Query, Request, Response, status
from sqlalchemy.orm import Session, sessionmaker
from starlette.concurrency import run_in_threadpool

from phaseward.api.auth import Admin, RailAdmin, RailReader, Reader
from phaseward.api.deps import ClockDep, ReadSessionDep, SessionsDep, SettingsDep
from phaseward.api.errors import ERROR_RESPONSES, links
from phaseward.api.schemas.common import MAX_ROW_ID
from phaseward.api.schemas.events import iso
from phaseward.api.schemas.rails import DefinitionWarning, RailBody, RailCreate, RailOut, RailSaved
from phaseward.api.schemas.status import RailStatus
from phaseward.errors import Forbidden
from phaseward.monitor import rails as rail_service
from phaseward.monitor.resident import LiveStates
from phaseward.monitor.sanity import Notice
from phaseward.monitor.status import rail_status
from phaseward.store import rails as rail_store
from phaseward.store.db import transaction
from phaseward.store.models import Rail

router = APIRouter(prefix="/v1/rails", tags=["rails"], responses=ERROR_RESPONSES)
RAIL_ID_PATTERN = r"^[a-z0-9][a-z0-9-]{0,63}$"
RailId = Annotated[str, Path(pattern=RAIL_ID_PATTERN, max_length=64)]
RowId = Annotated[int, Path(ge=0, le=MAX_ROW_ID)]  # an event, trace or job id


def _out(rail: Rail, spec: dict[str, object]) -> RailOut:
    return RailOut(
        id=rail.id, version=rail.version, created=iso(rail.created_s), updated=iso(rail.updated_s),
        spec=spec,
    )  # fmt: skip


def _saved(rail: Rail, spec: dict[str, object], warnings: list[Notice]) -> RailSaved:
    notes = [DefinitionWarning(field=w.field, rule=w.rule, detail=w.detail) for w in warnings]
    return RailSaved(**_out(rail, spec).model_dump(), warnings=notes)


@router.post(
    "",
    status_code=status.HTTP_201_CREATED,
    responses={201: links("rail_id", "GET /v1/rails/{rail_id}", "GET /v1/rails/{rail_id}/status",
                          "POST /v1/rails/{rail_id}/samples", "GET /v1/rails/{rail_id}/events",
                          "GET /v1/rails/{rail_id}/screening")},
)  # fmt: skip
def create_rail(body: RailCreate, sessions: SessionsDep, who: Admin) -> RailSaved:
    """Store a new rail. A definition that cannot be right is refused (422 naming the field);
    one that is merely unusual is stored, and the answer lists ``warnings``."""
    if not who.may_use(body.id):
        raise Forbidden(f"this key may not define rail '{body.id}'", field="id")
    spec = RailBody.model_validate(body.model_dump(exclude={"id"})).stored()
    rail, spec, warnings = rail_service.create(sessions, body.id, spec)
    return _saved(rail, spec, warnings)


@router.get("")
def list_rails(
    session: ReadSessionDep,
    settings: SettingsDep,
    who: Reader,
    after: Annotated[
        str | None,
        Query(
            pattern=r"^[a-z0-9][a-z0-9-]{0,63}$", max_length=64, description="cursor: last id seen"
        ),
    ] = None,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
) -> list[RailOut]:
    page = rail_store.list_page(
        session, after=after, limit=min(limit, settings.max_page_size), allowed=who.rails
    )
    specs = rail_store.specs(session, page)
    return [_out(r, specs[r.id]) for r in page]


@router.get("/{rail_id}")
def get_rail(rail_id: RailId, session: ReadSessionDep, _: RailReader) -> RailOut:
    rail, spec = rail_service.get(session, rail_id)
    return _out(rail, spec)


@router.put(
    "/{rail_id}", responses={201: {"model": RailSaved, "description": "The rail was new: created"}}
)
def put_rail(
    rail_id: RailId, body: RailBody, sessions: SessionsDep, response: Response, _: RailAdmin
) -> RailSaved:
    """Store the next version (or the first). Refusals and ``warnings`` as for POST; a
    refused definition leaves the stored one as it was."""
    rail, spec, created, warnings = rail_service.put_version(sessions, rail_id, body.stored())
    response.status_code = status.HTTP_201_CREATED if created else status.HTTP_200_OK
    return _saved(rail, spec, warnings)


@router.delete("/{rail_id}", status_code=status.HTTP_204_NO_CONTENT)
def delete_rail(rail_id: RailId, sessions: SessionsDep, _: RailAdmin) -> None:
    rail_service.delete(sessions, rail_id)


@router.get("/{rail_id}/status", response_model=RailStatus)
async def get_status(rail_id: RailId, request: Request, clock: ClockDep, _: RailReader) -> Response:
    state = request.app.state
    body = await run_in_threadpool(
        _status_json, state.read_sessions, rail_id, clock(), state.live_states
    )
    return Response(body, media_type="application/json")


def _status_json(
    sessions: sessionmaker[Session], rail_id: str, now_s: float, live: LiveStates
) -> bytes:
    """The whole read in one turn of a worker thread: a fleet's status reads wait for the
    server's interpreter at every crossing, and as a plain route with a session dependency a
    read crossed it four times (the session opened, the route, the answer checked against its
    model, the session closed)."""
    with transaction(sessions) as session:
        found = rail_status(session, rail_id, now_s=now_s, live_states=live)
    return RailStatus.model_validate(found).model_dump_json(by_alias=True).encode()
