"""Errors raised by the client. Every one carries what the caller needs to act on it.

::

    TidegateError
    ├── Rejected          the service refused the request (a 4xx answer); retrying will not help
    │   ├── Unauthorised  401: no token, or an unknown or revoked one
    │   ├── Forbidden     403: the token's role or model scope does not allow this
    │   ├── NotFound      404: no such model, snapshot or verdict
    │   └── Conflict      409: e.g. a snapshot key reused with other content
    └── Unreachable       no answer within the retries and the total timeout (network errors,
                          5xx, 503, 429 to the end)

A :class:`Rejected` post stored nothing. After :class:`Unreachable` the post may or may not have
been stored: posting it again with the same key is safe (the service answers the stored verdict).
"""

from __future__ import annotations

from typing import Any

__all__ = [
    "Conflict",
    "Forbidden",
    "NotFound",
    "Rejected",
    "TidegateError",
    "Unauthorised",
    "Unreachable",
]


class TidegateError(Exception):
    """Base class of every error the client raises."""


class Rejected(TidegateError):
    """The service answered with a 4xx error: the request is wrong and a retry will not help.

    Attributes
    ----------
    status : int
        The HTTP status (400-499).
    code : str
        The service's stable error code, e.g. ``invalid_request``.
    message : str
        What is wrong, in words.
    field : str or None
        Path of the offending value, e.g. ``sample.score[3]``.
    details : list of dict
        Every problem found, each with ``field`` and ``message``.
    request_id : str or None
        The ``X-Request-ID`` of the answer, for the service log.
    """

    def __init__(
        self,
        *,
        status: int,
        code: str,
        message: str,
        field: str | None = None,
        details: list[dict[str, Any]] | None = None,
        request_id: str | None = None,
    ) -> None:
        where = f" (field {field})" if field else ""
        super().__init__(f"{status} {code}: {message}{where}")
        self.status = status
        self.code = code
        self.message = message
        self.field = field
        self.details = details or []
        self.request_id = request_id


class Unauthorised(Rejected):
    """401: the request carried no valid API token."""


class Forbidden(Rejected):
    """403: the token's role or model scope does not allow this request."""


class NotFound(Rejected):
    """404: no such model, snapshot or verdict."""


class Conflict(Rejected):
    """409: the request contradicts what is stored (a key reused with other content, an override
    to the decision already in force, a baseline that already serves)."""


class Unreachable(TidegateError):
    """No usable answer within the retries and the total timeout.

    Attributes
    ----------
    url : str
        The service URL.
    attempts : int
        How many requests were sent.
    last_status : int or None
        The HTTP status of the last answer (e.g. 503), or None when the last attempt got no
        answer at all (connection refused, timed out).
    """

    def __init__(
        self, message: str, *, url: str, attempts: int, last_status: int | None = None
    ) -> None:
        super().__init__(message)
        self.url = url
        self.attempts = attempts
        self.last_status = last_status


_BY_STATUS: dict[int, type[Rejected]] = {
    401: Unauthorised,
    403: Forbidden,
    404: NotFound,
    409: Conflict,
}


def rejected_from(
    status: int, body: Any, *, text: str = "", request_id: str | None = None
) -> Rejected:
    """The :class:`Rejected` (or subclass) for a 4xx answer with JSON error *body*."""
    error = body.get("error") if isinstance(body, dict) else None
    error = error if isinstance(error, dict) else {}
    details = error.get("details")
    return _BY_STATUS.get(status, Rejected)(
        status=status,
        code=str(error.get("code") or f"http_{status}"),
        message=str(error.get("message") or text[:200] or "no message"),
        field=error.get("field") if isinstance(error.get("field"), str) else None,
        details=details if isinstance(details, list) else [],
        request_id=request_id,
    )
