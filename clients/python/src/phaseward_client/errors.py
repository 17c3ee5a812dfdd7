"""The exceptions of the client.

``PhasewardError`` is the one class for an answer the service refused: it carries the HTTP
status and the service's JSON error body (``error``, ``detail``, ``field``). Transport failures
(nothing answered) stay ``httpx.TransportError``. ``UnexpectedResponse`` is an answer whose
shape this client does not understand; ``SendFailed`` and ``BufferFull`` come from the
batching senders.
"""

from __future__ import annotations

import email.utils
import json
import math
import time
from collections.abc import Mapping, Sequence
from typing import Any

import httpx


class PhasewardError(Exception):
    """The service answered with a status other than 2xx.

    ``status``: the HTTP status; ``error``: the machine-readable code (``invalid_input``,
    ``not_found``, ``conflict``, ...); ``detail``: the human-readable text; ``field``: the
    offending field when the service names one (``"[3].phases[1].temp_c"``); ``errors``: the
    per-field list that validation errors add; ``retry_after_s``: the Retry-After header in
    seconds, if the answer had one.
    """

    def __init__(
        self,
        status: int,
        error: str,
        detail: str,
        field: str | None = None,
        *,
        errors: Sequence[Mapping[str, Any]] = (),
        retry_after_s: float | None = None,
    ) -> None:
        where = f" (field {field})" if field else ""
        super().__init__(f"{status} {error}: {detail}{where}")
        self.status = status
        self.error = error
        self.detail = detail
        self.field = field
        self.errors: list[dict[str, Any]] = [dict(e) for e in errors]
        self.retry_after_s = retry_after_s

    @classmethod
    def from_response(cls, response: httpx.Response) -> PhasewardError:
        """Build from a refused answer; a body that is not the service's JSON shape (a proxy's
        HTML page, say) becomes ``error="http_error"`` with the start of the text."""
        retry = parse_retry_after(response.headers.get("retry-after"))
        try:
            body = json.loads(response.content)
        except ValueError:
            body = None
        if isinstance(body, dict) and isinstance(body.get("error"), str):
            field = body.get("field")
            raw_errors = body.get("errors")
            errors = (
                [e for e in raw_errors if isinstance(e, dict)]
                if isinstance(raw_errors, list)
                else []
            )
            return cls(
                response.status_code,
                body["error"],
                str(body.get("detail", "")),
                field if isinstance(field, str) else None,
                errors=errors,
                retry_after_s=retry,
            )
        text = response.text.strip()[:500] or response.reason_phrase
        return cls(response.status_code, "http_error", text, None, retry_after_s=retry)


class UnexpectedResponse(Exception):
    """A 2xx answer whose body does not have the shape this client expects."""

    def __init__(self, detail: str, *, path: str = "") -> None:
        super().__init__(f"{path}: {detail}" if path else detail)
        self.detail = detail
        self.path = path


class SendFailed(Exception):
    """A batch of samples a sender gave up on. ``samples`` are the JSON items that were not
    stored; ``cause`` is the last error (a ``PhasewardError`` for a refused batch, an
    ``httpx.TransportError`` when retries ran out without an answer)."""

    def __init__(self, rail_id: str, samples: Sequence[Mapping[str, Any]], cause: Exception):
        super().__init__(f"{len(samples)} samples for rail '{rail_id}' were not stored: {cause}")
        self.rail_id = rail_id
        self.samples: list[dict[str, Any]] = [dict(s) for s in samples]
        self.cause = cause

    @property
    def status(self) -> int | None:
        """The HTTP status of the refusal, or None when nothing answered."""
        return self.cause.status if isinstance(self.cause, PhasewardError) else None


class BufferFull(Exception):
    """A sender's buffer stayed full for longer than its ``full_timeout_s``."""


def parse_retry_after(value: str | None, *, now_s: float | None = None) -> float | None:
    """Seconds to wait from a Retry-After header (delta seconds or an HTTP date), or None.

    >>> parse_retry_after("3")
    3.0
    >>> parse_retry_after("Thu, 01 Jan 1970 00:00:10 GMT", now_s=4.0)
    6.0
    >>> parse_retry_after("soon") is None
    True
    """
    if value is None:
        return None
    text = value.strip()
    try:
        seconds = float(text)
    except ValueError:
        try:
            moment = email.utils.parsedate_to_datetime(text)
        except (TypeError, ValueError):
            return None
        if moment.tzinfo is None:
            return None
        seconds = moment.timestamp() - (time.time() if now_s is None else now_s)
    if not math.isfinite(seconds):
        return None
    return max(0.0, seconds)
