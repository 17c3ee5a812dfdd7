"""One description per endpoint, shared by the sync and the async client.

A ``Call`` says what to send and how to read the answer; the clients only execute it. That
keeps the two clients identical in behaviour by construction.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, Generic, TypeVar
from urllib.parse import quote

import httpx

from phaseward_client.columns import COLUMNS_JSON, to_columns
from phaseward_client.errors import PhasewardError, UnexpectedResponse
from phaseward_client.inputs import (
    BreakerParams,
    Load,
    PhaseDrop,
    SampleLike,
    finite,
    sample_json,
    timestamp,
)
from phaseward_client.models import (
    BreakerStress,
    Event,
    EventPage,
    Forecast,
    IngestResult,
    Model,
    Rail,
    RailStatus,
    Ratings,
    Reliability,
    SampleWindow,
    Screening,
)

T = TypeVar("T")
M = TypeVar("M", bound=Model)
Params = list[tuple[str, str | int | float | bool | None]]
JSON = "application/json"
TimeLike = float | datetime | str


def auth_headers(api_key: str | None, headers: Mapping[str, str] | None) -> dict[str, str]:
    """The client's default headers: the caller's, plus the access key as a bearer token."""
    out = dict(headers or {})
    if api_key is not None:
        out["authorization"] = f"Bearer {api_key}"
    return out


def encode(body: object) -> bytes:
    """Compact JSON; NaN and infinities are refused here (JSON has no such numbers)."""
    try:
        return json.dumps(body, allow_nan=False, separators=(",", ":")).encode()
    except ValueError as err:
        raise ValueError(f"cannot send as JSON: {err}") from err


def rail_path(rail_id: str, suffix: str = "") -> str:
    if not rail_id:
        raise ValueError("rail_id is empty")
    return f"/v1/rails/{quote(rail_id, safe='')}{suffix}"


def _json(response: httpx.Response) -> object:
    try:
        return json.loads(response.content)
    except ValueError as err:
        raise UnexpectedResponse(
            f"{response.status_code} answer is not JSON: {response.text[:200]!r}",
            path=str(response.request.url.path),
        ) from err


def model(cls: type[M]) -> Callable[[httpx.Response], M]:
    def parse(response: httpx.Response) -> M:
        return cls.from_json(_json(response))

    return parse


def model_list(cls: type[M]) -> Callable[[httpx.Response], list[M]]:
    def parse(response: httpx.Response) -> list[M]:
        data = _json(response)
        if not isinstance(data, list):
            raise UnexpectedResponse("expected a list", path=cls.__name__)
        return [cls.from_json(item, path=f"[{k}]") for k, item in enumerate(data)]

    return parse


def nothing(_: httpx.Response) -> None:
    return None


def text(response: httpx.Response) -> str:
    return response.text


def raw_dict(response: httpx.Response) -> dict[str, Any]:
    data = _json(response)
    if not isinstance(data, dict):
        raise UnexpectedResponse("expected an object")
    return data


@dataclass(frozen=True)
class Call(Generic[T]):
    method: str
    path: str
    parse: Callable[[httpx.Response], T]
    params: Params = field(default_factory=list)
    body: bytes | None = None
    content_type: str = JSON

    def request(self, http: httpx.Client | httpx.AsyncClient) -> httpx.Request:
        headers = {"accept": JSON}
        if self.body is not None:
            headers["content-type"] = self.content_type
        return http.build_request(
            self.method, self.path, params=self.params, content=self.body, headers=headers
        )

    def answer(self, response: httpx.Response) -> T:
        if not response.is_success:
            raise PhasewardError.from_response(response)
        return self.parse(response)


# --- the endpoints -----------------------------------------------------------------------


def health() -> Call[dict[str, Any]]:
    return Call("GET", "/healthz", raw_dict)


def create_rail(definition: Mapping[str, Any], rail_id: str | None) -> Call[Rail]:
    body = dict(definition)
    if rail_id is not None:
        body["id"] = rail_id
    if not isinstance(body.get("id"), str):
        raise ValueError("a rail definition needs an 'id' (or pass rail_id=)")
    return Call("POST", "/v1/rails", model(Rail), body=encode(body))


def get_rail(rail_id: str) -> Call[Rail]:
    return Call("GET", rail_path(rail_id), model(Rail))


def list_rails(after: str | None, limit: int) -> Call[list[Rail]]:
    params: Params = [("limit", str(limit))]
    if after is not None:
        params.append(("after", after))
    return Call("GET", "/v1/rails", model_list(Rail), params=params)


def put_rail(rail_id: str, definition: Mapping[str, Any]) -> Call[Rail]:
    body = dict(definition)
    given = body.pop("id", rail_id)
    if given != rail_id:
        raise ValueError(f"the definition's id '{given}' is not the rail '{rail_id}'")
    return Call("PUT", rail_path(rail_id), model(Rail), body=encode(body))


def delete_rail(rail_id: str) -> Call[None]:
    return Call("DELETE", rail_path(rail_id), nothing)


def post_samples(rail_id: str, samples: SampleLike | Sequence[SampleLike]) -> Call[IngestResult]:
    """One sample is sent as an object, a sequence as a JSON array (stored all or nothing)."""
    if isinstance(samples, Sequence):
        items: object = [sample_json(s) for s in samples]
        if not items:
            raise ValueError("no samples to post")
    else:
        items = sample_json(samples)
    return Call("POST", rail_path(rail_id, "/samples"), model(IngestResult), body=encode(items))


def post_columns(rail_id: str, samples: Sequence[SampleLike]) -> Call[IngestResult]:
    """A batch as one columnar body (as objects when it does not fit columns)."""
    items = [sample_json(s) for s in samples]
    if not items:
        raise ValueError("no samples to post")
    body = to_columns(items)
    if body is None:
        return post_samples(rail_id, items)
    return Call(
        "POST", rail_path(rail_id, "/samples"), model(IngestResult), body=encode(body),
        content_type=COLUMNS_JSON,
    )  # fmt: skip


def get_samples(rail_id: str, since: float, until: float, limit: int) -> Call[SampleWindow]:
    params: Params = [
        ("since", repr(finite(since, "since"))),
        ("until", repr(finite(until, "until"))),
        ("limit", str(limit)),
    ]
    return Call("GET", rail_path(rail_id, "/samples"), model(SampleWindow), params=params)


def status(rail_id: str) -> Call[RailStatus]:
    return Call("GET", rail_path(rail_id, "/status"), model(RailStatus))


def _event_time(value: TimeLike, name: str) -> str:
    t = timestamp(value, name)
    return t if isinstance(t, str) else repr(t)


def list_events(
    rail_id: str | None,
    *,
    kind: Sequence[str] = (),
    severity: Sequence[str] = (),
    phase: int | None = None,
    since: TimeLike | None = None,
    until: TimeLike | None = None,
    cursor: str | None = None,
    limit: int = 100,
) -> Call[EventPage]:
    if isinstance(kind, str) or isinstance(severity, str):
        raise TypeError("kind and severity take a sequence of strings")
    params: Params = [("kind", k) for k in kind]
    params += [("severity", s) for s in severity]
    if phase is not None:
        params.append(("phase", str(phase)))
    if since is not None:
        params.append(("since", _event_time(since, "since")))
    if until is not None:
        params.append(("until", _event_time(until, "until")))
    if cursor is not None:
        params.append(("cursor", cursor))
    params.append(("limit", str(limit)))
    path = "/v1/events" if rail_id is None else rail_path(rail_id, "/events")
    return Call("GET", path, model(EventPage), params=params)


def ack_event(event_id: int, by: str, note: str | None) -> Call[Event]:
    body: dict[str, Any] = {"by": by}
    if note is not None:
        body["note"] = note
    return Call("POST", f"/v1/events/{int(event_id)}/ack", model(Event), body=encode(body))


def screening(rail_id: str, depth: int) -> Call[Screening]:
    params: Params = [("depth", str(depth))]
    return Call("GET", rail_path(rail_id, "/screening"), model(Screening), params=params)


def ratings(rail_id: str, durations_s: Sequence[float], pairs: bool) -> Call[Ratings]:
    params: Params = [("duration_s", str(finite(d, "durations_s"))) for d in durations_s]
    if pairs:
        params.append(("pairs", "true"))
    return Call("GET", rail_path(rail_id, "/ratings"), model(Ratings), params=params)


def forecast(
    rail_id: str,
    *,
    load: Load | None,
    drop: Sequence[PhaseDrop],
    horizon_s: float | None,
    points: int | None,
    ambient_c: float | None,
) -> Call[Forecast]:
    body: dict[str, Any] = {"drop": [d.to_json() for d in drop]}
    if load is not None:
        body["load"] = load.to_json()
    if horizon_s is not None:
        body["horizon_s"] = finite(horizon_s, "horizon_s")
    if points is not None:
        body["points"] = int(points)
    if ambient_c is not None:
        body["ambient_c"] = finite(ambient_c, "ambient_c")
    return Call("POST", rail_path(rail_id, "/forecast"), model(Forecast), body=encode(body))


def reliability(rail_id: str, hours: float) -> Call[Reliability]:
    params: Params = [("hours", repr(finite(hours, "hours")))]
    return Call("GET", rail_path(rail_id, "/reliability"), model(Reliability), params=params)


def breaker_stress(params: BreakerParams) -> Call[BreakerStress]:
    return Call(
        "POST", "/v1/tools/breaker-stress", model(BreakerStress), body=encode(params.to_json())
    )


def upload_trace(content: bytes, content_type: str, name: str) -> Call[dict[str, Any]]:
    """A recording for rehearsals: CSV (``text/csv``), NDJSON or a JSON array of samples."""
    return Call("POST", "/v1/traces", raw_dict, params=[("name", name)], body=content,
                content_type=content_type)  # fmt: skip


def upload_capture(
    rail_id: str, event_id: int, content: bytes, content_type: str
) -> Call[dict[str, Any]]:
    """The waveform recorded around a trip, for a ``phase.isolated`` event: ``text/csv``,
    ``application/x-npy`` or ``application/x-npz``; answers the capture and its fault class."""
    return Call("POST", rail_path(rail_id, f"/events/{int(event_id)}/capture"), raw_dict,
                body=content, content_type=content_type)  # fmt: skip


def start_rehearsal(request: Mapping[str, Any]) -> Call[dict[str, Any]]:
    return Call("POST", "/v1/rehearsals", raw_dict, body=encode(dict(request)))


def rehearsal(rehearsal_id: int) -> Call[dict[str, Any]]:
    return Call("GET", f"/v1/rehearsals/{int(rehearsal_id)}", raw_dict)


def rehearsal_file(rehearsal_id: int, name: str) -> Call[str]:
    """``table.csv`` or ``pareto.svg`` of a finished rehearsal."""
    if name not in ("table.csv", "pareto.svg"):
        raise ValueError("name must be table.csv or pareto.svg")
    return Call("GET", f"/v1/rehearsals/{int(rehearsal_id)}/{name}", text)


def calibrate(rail_id: str, request: Mapping[str, Any]) -> Call[dict[str, Any]]:
    return Call("POST", rail_path(rail_id, "/calibrations"), raw_dict, body=encode(dict(request)))


def fit_curve(request: Mapping[str, Any]) -> Call[dict[str, Any]]:
    """A heating or cooling curve with a known power step fitted without a rail."""
    return Call("POST", "/v1/tools/calibrations", raw_dict, body=encode(dict(request)))


def export_settings(rehearsal_id: int, row: int) -> Call[dict[str, Any]]:
    """One row of a finished rehearsal as firmware settings (JSON)."""
    return Call("GET", f"/v1/rehearsals/{int(rehearsal_id)}/rows/{int(row)}/settings.json",
                raw_dict)  # fmt: skip


def export_header(rehearsal_id: int, row: int) -> Call[str]:
    """One row of a finished rehearsal as a C header."""
    return Call("GET", f"/v1/rehearsals/{int(rehearsal_id)}/rows/{int(row)}/settings.h", text)
