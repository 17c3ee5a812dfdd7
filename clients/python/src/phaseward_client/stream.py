"""Server-Sent Events of the service's live event stream, parsed into ``Event`` objects."""

from __future__ import annotations

import json
from collections.abc import Iterable
from dataclasses import dataclass, field

from phaseward_client.models import Event

STREAM_PATH = "/v1/events/stream"


@dataclass
class FrameReader:
    """Feeds lines of an SSE stream; yields an Event at the end of each frame with data."""

    last_id: int | None = None
    _data: list[str] = field(default_factory=list)

    def feed(self, lines: Iterable[str]) -> list[Event]:
        out: list[Event] = []
        for line in lines:
            if line == "":
                if self._data:
                    event = Event.from_json(json.loads("\n".join(self._data)))
                    self.last_id = event.id
                    out.append(event)
                self._data = []
            elif line.startswith("data:"):
                self._data.append(line[5:].lstrip(" "))
        return out


def stream_params(
    rail_id: str | None, kind: Iterable[str], after: int | None, limit: int | None
) -> list[tuple[str, str | int | float | bool | None]]:
    params: list[tuple[str, str | int | float | bool | None]] = [("kind", k) for k in kind]
    if rail_id is not None:
        params.append(("rail_id", rail_id))
    if after is not None:
        params.append(("after", int(after)))
    if limit is not None:
        params.append(("limit", int(limit)))
    return params
