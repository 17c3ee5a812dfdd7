"""The synchronous client."""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from types import TracebackType
from typing import Any, Self, TypeVar

import httpx

from phaseward_client import _calls
from phaseward_client._calls import Call, TimeLike, auth_headers
from phaseward_client.errors import PhasewardError
from phaseward_client.inputs import BreakerParams, Load, PhaseDrop, SampleLike
from phaseward_client.models import (
    BreakerStress,
    Event,
    EventPage,
    Forecast,
    IngestResult,
    Rail,
    RailStatus,
    Ratings,
    Reliability,
    SampleWindow,
    Screening,
)
from phaseward_client.stream import STREAM_PATH, FrameReader, stream_params

T = TypeVar("T")
DEFAULT_URL = "http://127.0.0.1:8470"


class Client:
    """Talks to one phaseward service. Every method raises ``PhasewardError`` when the service
    refuses (4xx/5xx) and lets ``httpx.TransportError`` through when nothing answered.

    ``transport`` and ``http`` are for tests and special setups (a proxy, a mounted
    transport); by default the client owns one ``httpx.Client`` and closes it on ``close()``.
    """

    def __init__(
        self,
        base_url: str = DEFAULT_URL,
        *,
        timeout_s: float = 10.0,
        api_key: str | None = None,
        headers: Mapping[str, str] | None = None,
        transport: httpx.BaseTransport | None = None,
        http: httpx.Client | None = None,
    ) -> None:
        self._owns_http = http is None
        self.http = http or httpx.Client(
            base_url=base_url,
            timeout=timeout_s,
            headers=auth_headers(api_key, headers),
            transport=transport,
        )

    @property
    def base_url(self) -> str:
        return str(self.http.base_url)

    def close(self) -> None:
        if self._owns_http:
            self.http.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def _run(self, call: Call[T]) -> T:
        return call.answer(self.http.send(call.request(self.http)))

    # --- rails ---------------------------------------------------------------------------

    def health(self) -> dict[str, Any]:
        return self._run(_calls.health())

    def create_rail(self, definition: Mapping[str, Any], *, rail_id: str | None = None) -> Rail:
        """Define a new rail (409 ``conflict`` if the id is taken: use ``put_rail``)."""
        return self._run(_calls.create_rail(definition, rail_id))

    def get_rail(self, rail_id: str) -> Rail:
        return self._run(_calls.get_rail(rail_id))

    def list_rails(self, *, after: str | None = None, limit: int = 100) -> list[Rail]:
        """One page of rails in id order; pass the last id seen as ``after`` for the next."""
        return self._run(_calls.list_rails(after, limit))

    def iter_rails(self, *, page_size: int = 100) -> Iterator[Rail]:
        after: str | None = None
        while True:
            page = self.list_rails(after=after, limit=page_size)
            yield from page
            if len(page) < page_size:
                return
            after = page[-1].id

    def put_rail(self, rail_id: str, definition: Mapping[str, Any]) -> Rail:
        """Store a new version of the rail (or create it); an ``id`` key must match."""
        return self._run(_calls.put_rail(rail_id, definition))

    def delete_rail(self, rail_id: str) -> None:
        self._run(_calls.delete_rail(rail_id))

    # --- telemetry -----------------------------------------------------------------------

    def post_sample(self, rail_id: str, sample: SampleLike) -> IngestResult:
        return self._run(_calls.post_samples(rail_id, sample))

    def post_samples(self, rail_id: str, samples: Sequence[SampleLike]) -> IngestResult:
        """Post a batch as one JSON array: stored whole, or refused whole with a 4xx."""
        return self._run(_calls.post_samples(rail_id, samples))

    def post_columns(self, rail_id: str, samples: Sequence[SampleLike]) -> IngestResult:
        """Post a batch as one columnar body (checked as arrays by the service, much cheaper
        per sample than objects): stored whole, or refused whole with a 4xx."""
        return self._run(_calls.post_columns(rail_id, samples))

    def get_samples(
        self, rail_id: str, *, since: float, until: float, limit: int = 1000
    ) -> SampleWindow:
        """Stored samples with ``since <= time < until`` (epoch seconds), oldest first."""
        return self._run(_calls.get_samples(rail_id, since, until, limit))

    def status(self, rail_id: str) -> RailStatus:
        return self._run(_calls.status(rail_id))

    # --- events --------------------------------------------------------------------------

    def list_events(
        self,
        rail_id: str | None = None,
        *,
        kind: Sequence[str] = (),
        severity: Sequence[str] = (),
        phase: int | None = None,
        since: TimeLike | None = None,
        until: TimeLike | None = None,
        cursor: str | None = None,
        limit: int = 100,
    ) -> EventPage:
        """One page, newest first, of one rail's events (or every rail's, ``rail_id=None``)."""
        return self._run(
            _calls.list_events(
                rail_id, kind=kind, severity=severity, phase=phase, since=since, until=until,
                cursor=cursor, limit=limit,
            )
        )  # fmt: skip

    def iter_events(
        self,
        rail_id: str | None = None,
        *,
        kind: Sequence[str] = (),
        severity: Sequence[str] = (),
        phase: int | None = None,
        since: TimeLike | None = None,
        until: TimeLike | None = None,
        page_size: int = 100,
        after_id: int | None = None,
    ) -> Iterator[Event]:
        """Every matching event, newest first, following the cursor page after page.

        ``after_id`` stops at the first event with an id at or below it (ids only grow, so
        this yields exactly the events newer than a remembered one)."""
        cursor: str | None = None
        while True:
            page = self.list_events(
                rail_id, kind=kind, severity=severity, phase=phase, since=since, until=until,
                cursor=cursor, limit=page_size,
            )  # fmt: skip
            for event in page.items:
                if after_id is not None and event.id <= after_id:
                    return
                yield event
            if page.next_cursor is None:
                return
            cursor = page.next_cursor

    def ack_event(self, event_id: int, *, by: str, note: str | None = None) -> Event:
        """Acknowledge an event (409 ``conflict`` if someone did already)."""
        return self._run(_calls.ack_event(event_id, by, note))

    # --- analyses ------------------------------------------------------------------------

    def screening(self, rail_id: str, *, depth: int = 1) -> Screening:
        """Every single (depth 1) or pair (depth 2) of further phase losses, weakest first."""
        return self._run(_calls.screening(rail_id, depth))

    def ratings(
        self, rail_id: str, *, durations_s: Sequence[float] = (), pairs: bool = False
    ) -> Ratings:
        """Time-limited ratings from the present state: the highest constant load for each
        duration (default 1 min, 10 min, 1 h; indefinitely always last) for the rail as it
        is and after every further loss (and pair, with ``pairs``)."""
        return self._run(_calls.ratings(rail_id, durations_s, pairs))

    def forecast(
        self,
        rail_id: str,
        *,
        load: Load | None = None,
        drop: Sequence[PhaseDrop] = (),
        horizon_s: float | None = None,
        points: int | None = None,
        ambient_c: float | None = None,
    ) -> Forecast:
        """Junction temperatures from the present state under a load profile and phase drops
        (``None`` leaves a setting to the service's default)."""
        return self._run(
            _calls.forecast(
                rail_id, load=load, drop=drop, horizon_s=horizon_s, points=points,
                ambient_c=ambient_c,
            )
        )  # fmt: skip

    def reliability(self, rail_id: str, *, hours: float) -> Reliability:
        return self._run(_calls.reliability(rail_id, hours))

    def breaker_stress(self, params: BreakerParams) -> BreakerStress:
        return self._run(_calls.breaker_stress(params))

    def upload_trace(
        self, content: bytes, *, content_type: str = "text/csv", name: str = "trace"
    ) -> dict[str, Any]:
        """Upload a recording for rehearsals; answers its id, sample and phase counts."""
        return self._run(_calls.upload_trace(content, content_type, name))

    def upload_capture(
        self, rail_id: str, event_id: int, content: bytes, *, content_type: str = "text/csv"
    ) -> dict[str, Any]:
        """Attach the waveform recorded around a trip to its ``phase.isolated`` event (CSV,
        ``application/x-npy`` or ``application/x-npz``); answers the capture and the fault
        class the service found in it."""
        return self._run(_calls.upload_capture(rail_id, event_id, content, content_type))

    def start_rehearsal(self, request: Mapping[str, Any]) -> dict[str, Any]:
        """Queue a rehearsal (trace, settings with lists to sweep, labels); answers the job."""
        return self._run(_calls.start_rehearsal(request))

    def rehearsal(self, rehearsal_id: int) -> dict[str, Any]:
        """A rehearsal's status, percent done, and result once done."""
        return self._run(_calls.rehearsal(rehearsal_id))

    def rehearsal_file(self, rehearsal_id: int, name: str) -> str:
        """``table.csv`` or ``pareto.svg`` of a finished rehearsal."""
        return self._run(_calls.rehearsal_file(rehearsal_id, name))

    def calibrate(self, rail_id: str, request: Mapping[str, Any]) -> dict[str, Any]:
        """Fit the rail's thermal model to a heating or cooling curve."""
        return self._run(_calls.calibrate(rail_id, request))

    def fit_curve(self, request: Mapping[str, Any]) -> dict[str, Any]:
        """Fit a heating or cooling curve with a known power step; no rail needed."""
        return self._run(_calls.fit_curve(request))

    def export_settings(self, rehearsal_id: int, row: int) -> dict[str, Any]:
        """Row ``row`` of a finished rehearsal as firmware settings: post its ``settings``
        and ``missing`` with the same trace and labels to rehearse them again."""
        return self._run(_calls.export_settings(rehearsal_id, row))

    def export_header(self, rehearsal_id: int, row: int) -> str:
        """Row ``row`` of a finished rehearsal as a C header."""
        return self._run(_calls.export_header(rehearsal_id, row))

    def follow_events(
        self,
        *,
        rail_id: str | None = None,
        kind: Sequence[str] = (),
        after: int | None = None,
        limit: int | None = None,
    ) -> Iterator[Event]:
        """Events as the service derives them (Server-Sent Events), oldest first, from after
        ``after`` (default: the next new one); ends after ``limit`` events if given."""
        params = stream_params(rail_id, kind, after, limit)
        reader = FrameReader()
        with self.http.stream(
            "GET", STREAM_PATH, params=params, timeout=httpx.Timeout(10.0, read=None)
        ) as response:
            if not response.is_success:
                response.read()
                raise PhasewardError.from_response(response)
            for line in response.iter_lines():
                yield from reader.feed([line])
