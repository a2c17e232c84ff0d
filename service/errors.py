"""Errors that reach a client. Each carries its HTTP status and a stable code as class
attributes; one handler in :mod:`service.api.errors` turns any of them into the JSON shape
``{"error": {"code", "message", "field", "details"}}``.

::

    TidegateError (500, internal)
    ├── InvalidInput (422, invalid_request)   field: the path of the offending value
    ├── NotFound (404, not_found)
    ├── Conflict (409, conflict)
    ├── PayloadTooLarge (413, payload_too_large)
    ├── UnsupportedMediaType (415, unsupported_media_type)
    ├── Unauthorized (401, unauthorized)
    ├── Forbidden (403, forbidden)
    ├── NotReady (503, not_ready)
    └── Busy (429, busy)                      with a Retry-After header
"""

from __future__ import annotations

from typing import Any


class TidegateError(Exception):
    """Base class: an error with a status, a stable code, a message and an optional field."""

    status: int = 500
    code: str = "internal"

    def __init__(
        self,
        message: str,
        *,
        field: str | None = None,
        code: str | None = None,
        details: list[dict[str, Any]] | None = None,
    ) -> None:
        super().__init__(message)
        self.message = message
        self.field = field
        self.details = details or []
        if code is not None:
            self.code = code

    def body(self) -> dict[str, Any]:
        return {
            "error": {
                "code": self.code,
                "message": self.message,
                "field": self.field,
                "details": self.details,
            }
        }


class InvalidInput(TidegateError):
    """The request is malformed; nothing was stored."""

    status = 422
    code = "invalid_request"


class NotFound(TidegateError):
    """No such model, snapshot or verdict."""

    status = 404
    code = "not_found"


class Conflict(TidegateError):
    """The request contradicts what is stored (e.g. a snapshot key reused with other content)."""

    status = 409
    code = "conflict"


class PayloadTooLarge(TidegateError):
    """The request body is larger than the configured maximum."""

    status = 413
    code = "payload_too_large"


class UnsupportedMediaType(TidegateError):
    """The body's Content-Type or Content-Encoding is not one the route reads."""

    status = 415
    code = "unsupported_media_type"


class Unauthorized(TidegateError):
    """No valid API token."""

    status = 401
    code = "unauthorized"


class Forbidden(TidegateError):
    """The token's role or model scope does not allow this."""

    status = 403
    code = "forbidden"


class NotReady(TidegateError):
    """The service cannot serve yet (database not reachable or not migrated)."""

    status = 503
    code = "not_ready"


class Busy(TidegateError):
    """Too much of this work is running already; retry after ``retry_after`` seconds."""

    status = 429
    code = "busy"

    def __init__(self, message: str, *, retry_after: int = 10, **kwargs: Any) -> None:
        super().__init__(message, **kwargs)
        self.retry_after = retry_after
