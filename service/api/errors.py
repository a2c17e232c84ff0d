"""One place that turns errors into the JSON error shape. No input may produce a 500 with an
HTML page or a non-JSON body; validation errors never echo the offending input (it may hold
NaN, which strict JSON cannot carry)."""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from sqlalchemy.exc import OperationalError
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.errors import Busy, InvalidInput, TidegateError
from service.store.db import StorageBusy
from service.text import shown

log = logging.getLogger("tidegate.api")

_HTTP_CODES = {
    400: "bad_request",
    401: "unauthorized",
    403: "forbidden",
    404: "not_found",
    405: "method_not_allowed",
    406: "not_acceptable",
    409: "conflict",
    413: "payload_too_large",
    415: "unsupported_media_type",
    422: "invalid_request",
    429: "too_many_requests",
}


def field_path(loc: Sequence[Any]) -> str:
    """``("body", "sample", "score", 3)`` -> ``sample.score[3]``."""
    parts = list(loc)
    if parts and parts[0] in {"body", "query", "path", "header", "cookie"}:
        origin = parts.pop(0)
        if origin != "body" and parts:
            return f"{origin}.{'.'.join(shown(p, quote=False) for p in parts)}"
    out = ""
    for part in parts:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            # a dict key is input: a short escaped prefix of it only
            out += ("." if out else "") + shown(part, quote=False)
    return out


def error_response(
    status: int,
    code: str,
    message: str,
    field: str | None = None,
    details: list[dict[str, Any]] | None = None,
) -> JSONResponse:
    return JSONResponse(
        status_code=status,
        content={
            "error": {"code": code, "message": message, "field": field, "details": details or []}
        },
    )


async def _tidegate_error(_request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, TidegateError)
    response = JSONResponse(status_code=exc.status, content=exc.body())
    if exc.status == 401:
        response.headers["WWW-Authenticate"] = 'Bearer realm="tidegate"'
    if isinstance(exc, Busy):
        response.headers["Retry-After"] = str(exc.retry_after)
    return response


async def _storage_error(_request: Request, exc: Exception) -> JSONResponse:
    """The database failed (locked past the busy timeout, gone, disk full): the transaction was
    rolled back, so nothing of the request was stored and a retry is safe."""
    log.error("storage error: %s", exc, exc_info=exc)
    response = error_response(
        503,
        "storage_unavailable",
        "the database did not complete the request; nothing was stored, retry later",
    )
    response.headers["Retry-After"] = "1"
    return response


async def _storage_busy(_request: Request, exc: Exception) -> JSONResponse:
    """The write's turn did not come within ``sqlite_write_wait_seconds``: nothing was stored."""
    log.warning("storage busy: %s", exc)
    response = error_response(503, "storage_busy", str(exc))
    response.headers["Retry-After"] = "5"
    return response


def _not_json(request: Request, exc: RequestValidationError) -> bool:
    """A body sent with a Content-Type other than JSON (the body was not parsed at all)."""
    if request.method not in {"POST", "PUT", "PATCH"}:
        return False
    ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
    body_level = any(tuple(err.get("loc", ())) == ("body",) for err in exc.errors())
    return body_level and not (ctype == "application/json" or ctype.endswith("+json"))


def invalid_from_errors(errors: Sequence[Any]) -> InvalidInput:
    """The 422 for a list of pydantic errors: the first error's field and message, every
    error (at most 50) in ``details``, never the offending input."""
    details = []
    for err in list(errors)[:50]:
        kind = str(err.get("type", ""))
        message = str(err.get("msg", "invalid value"))
        if kind == "extra_forbidden":
            message = "unknown field"
        loc = err.get("loc", ())
        if kind == "json_invalid":
            where = loc[-1] if loc and isinstance(loc[-1], int) else None
            message = (
                "body is not valid JSON"
                + (f" at character {where}" if where else "")
                + ": "
                + str(err.get("ctx", {}).get("error", ""))
            )
            loc = ()
        details.append({"field": field_path(loc) or None, "message": message, "type": kind})
    first = details[0] if details else {"field": None, "message": "invalid request"}
    code = "invalid_json" if first.get("type") == "json_invalid" else "invalid_request"
    return InvalidInput(
        f"{first['field'] or 'request'}: {first['message']}",
        field=first["field"],
        code=code,
        details=details,
    )


async def _validation_error(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, RequestValidationError)
    if _not_json(request, exc):
        return error_response(
            415,
            "unsupported_media_type",
            "send the body as JSON with Content-Type: application/json",
        )
    invalid = invalid_from_errors(exc.errors())
    return JSONResponse(status_code=invalid.status, content=invalid.body())


async def _http_error(_request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, StarletteHTTPException)
    if exc.status_code == 400 and isinstance(exc.__cause__, (ValueError, RecursionError)):
        # the body could not be decoded (not UTF-8) or parsed (nested too deep)
        return error_response(
            422, "invalid_json", f"body is not valid JSON: {type(exc.__cause__).__name__}"
        )
    code = _HTTP_CODES.get(exc.status_code, "http_error")
    response = error_response(exc.status_code, code, str(exc.detail))
    if exc.headers:
        response.headers.update(exc.headers)
    return response


async def _unexpected(_request: Request, exc: Exception) -> JSONResponse:
    log.exception("unhandled error", exc_info=exc)
    return error_response(500, "internal", "internal error; see the service log")


def install_error_handlers(app: FastAPI) -> None:
    app.add_exception_handler(TidegateError, _tidegate_error)
    app.add_exception_handler(RequestValidationError, _validation_error)
    app.add_exception_handler(StarletteHTTPException, _http_error)
    app.add_exception_handler(OperationalError, _storage_error)
    app.add_exception_handler(StorageBusy, _storage_busy)
    app.add_exception_handler(Exception, _unexpected)
