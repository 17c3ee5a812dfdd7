"""Errors that reach a client, one base class and one JSON shape.

Exception tree::

    PhasewardError (500)
    ├── BadRequest (400)          malformed body (bad JSON, bad NDJSON line)
    ├── Unauthorized (401)        no access key, or not a valid one
    ├── Forbidden (403)           a key whose role or rails do not allow the request
    ├── NotFound (404)            unknown rail or event
    ├── Conflict (409)            rail id taken, sequence number reused with other content
    ├── PayloadTooLarge (413)     body or batch over the configured limit
    ├── UnsupportedMediaType (415)
    ├── InvalidInput (422)        a value that cannot be right, naming its field
    ├── TooManyRequests (429)     a key over its rate; Retry-After says when to come back
    └── ServiceUnavailable (503)  database read-only, full or locked for too long

The API renders every one as ``{"error": ..., "detail": ..., "field": ...}``.
"""

from __future__ import annotations


class PhasewardError(Exception):
    status_code = 500
    error = "internal_error"

    def __init__(self, detail: str, *, field: str | None = None) -> None:
        super().__init__(detail)
        self.detail = detail
        self.field = field


class BadRequest(PhasewardError):
    status_code = 400
    error = "bad_request"


class Unauthorized(PhasewardError):
    status_code = 401
    error = "unauthorized"


class Forbidden(PhasewardError):
    status_code = 403
    error = "forbidden"


class NotFound(PhasewardError):
    status_code = 404
    error = "not_found"


class Conflict(PhasewardError):
    status_code = 409
    error = "conflict"


class PayloadTooLarge(PhasewardError):
    status_code = 413
    error = "payload_too_large"


class UnsupportedMediaType(PhasewardError):
    status_code = 415
    error = "unsupported_media_type"


class InvalidInput(PhasewardError):
    status_code = 422
    error = "invalid_input"


class TooManyRequests(PhasewardError):
    status_code = 429
    error = "too_many_requests"

    def __init__(self, detail: str, *, retry_after_s: float) -> None:
        super().__init__(detail, field=None)
        self.retry_after_s = retry_after_s


class ServiceUnavailable(PhasewardError):
    status_code = 503
    error = "service_unavailable"
