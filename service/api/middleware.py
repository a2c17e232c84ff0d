"""Pure ASGI middleware: the request context (id, log line, metrics, last-resort 500) and the
body limit.

Order, outermost first: :class:`RequestContext` -> :class:`BodyLimit` ->
:class:`~service.api.auth.TokenGate` -> the routes.
"""

from __future__ import annotations

import json
import logging
import re
import time
import uuid
from typing import Any

from starlette.exceptions import HTTPException as StarletteHTTPException

from service import logs
from service.api.auth import ASGIApp, Message, Receive, Scope, Send, header
from service.metrics import Metrics

log = logging.getLogger("tidegate.http")

REQUEST_ID = re.compile(r"^[A-Za-z0-9._:/+=-]{1,100}$")


def _error_body(status: int, code: str, message: str) -> bytes:
    return json.dumps(
        {"error": {"code": code, "message": message, "field": None, "details": []}}
    ).encode("utf-8")


async def send_error(
    send: Send,
    status: int,
    code: str,
    message: str,
    headers: list[tuple[bytes, bytes]] | None = None,
) -> None:
    body = _error_body(status, code, message)
    await send(
        {
            "type": "http.response.start",
            "status": status,
            "headers": [
                (b"content-type", b"application/json"),
                (b"content-length", str(len(body)).encode()),
                *(headers or []),
            ],
        }
    )
    await send({"type": "http.response.body", "body": body})


def _route_template(scope: Scope) -> str:
    route = scope.get("route")
    path = getattr(route, "path", None)
    return str(path) if path else "unmatched"


class RequestContext:
    """Request id (``X-Request-ID`` in and out), one structured log line per request, request
    metrics, and a JSON 500 for anything that escapes the error handlers."""

    def __init__(self, app: ASGIApp, *, metrics: Metrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        given = (header(scope, b"x-request-id") or "").strip()
        rid = given if REQUEST_ID.match(given) else uuid.uuid4().hex
        token = logs.request_id.set(rid)
        started = time.perf_counter()
        state: dict[str, Any] = {"status": 0, "code": None, "started": False}

        async def send_with_id(message: Message) -> None:
            if message["type"] == "http.response.start":
                state["started"] = True
                state["status"] = int(message["status"])
                headers = [
                    (k, v) for k, v in message.get("headers", []) if k.lower() != b"x-request-id"
                ]
                headers.append((b"x-request-id", rid.encode("latin-1")))
                message = {**message, "headers": headers}
            elif (
                message["type"] == "http.response.body"
                and state["status"] >= 400
                and state["code"] is None
            ):
                state["code"] = _error_code(message.get("body", b""))
            await send(message)

        try:
            await self.app(scope, receive, send_with_id)
        except Exception:
            log.exception("unhandled error", extra=logs.fields(path=scope.get("path")))
            if state["started"]:
                raise
            await send_error(send_with_id, 500, "internal", "internal error; see the service log")
        finally:
            seconds = time.perf_counter() - started
            route = _route_template(scope)
            principal = scope.get("state", {}).get("principal")
            self.metrics.request(
                method=scope.get("method", ""),
                route=route,
                status=state["status"],
                code=state["code"],
                seconds=seconds,
            )
            log.info(
                "%s %s %s",
                scope.get("method"),
                scope.get("path"),
                state["status"],
                extra=logs.fields(
                    request_id=rid,
                    method=scope.get("method"),
                    path=scope.get("path"),
                    route=route,
                    status=state["status"],
                    error=state["code"],
                    duration_ms=round(seconds * 1000.0, 3),
                    actor=getattr(principal, "name", None),
                ),
            )
            logs.request_id.reset(token)


def _error_code(body: bytes) -> str | None:
    try:
        value = json.loads(body)
        return str(value["error"]["code"])
    except (ValueError, KeyError, TypeError):
        return None


class BodyTooLarge(StarletteHTTPException):
    """Raised from ``receive`` when the streamed body passes the limit (answered with 413)."""

    def __init__(self, limit: int) -> None:
        super().__init__(413, f"request body larger than {limit} bytes")


class BodyLimit:
    """413 for a body larger than ``limit`` bytes, before it is held in memory: a declared
    ``Content-Length`` above the limit is refused without reading; otherwise the bytes are
    counted as they stream in and reading stops at the limit."""

    def __init__(self, app: ASGIApp, *, limit: int) -> None:
        self.app = app
        self.limit = limit

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = header(scope, b"content-length")
        if declared is not None:
            text = declared.strip()
            if not text.isdigit():
                await send_error(send, 400, "bad_request", "Content-Length is not a number")
                return
            if int(text) > self.limit:
                await send_error(
                    send,
                    413,
                    "payload_too_large",
                    f"request body larger than {self.limit} bytes",
                    [(b"connection", b"close")],
                )
                return
        seen = 0
        started = False

        async def counting_receive() -> Message:
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > self.limit:
                    raise BodyTooLarge(self.limit)
            return message

        async def tracking_send(message: Message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, counting_receive, tracking_send)
        except BodyTooLarge:
            if started:
                raise
            await send_error(
                send,
                413,
                "payload_too_large",
                f"request body larger than {self.limit} bytes",
                [(b"connection", b"close")],
            )


#: The Content-Security-Policy of every answer: scripts, styles, fonts and images from the
#: service itself only (no inline script or style, nothing from another site; SVG charts are
#: inline markup, and Swagger UI's icons are ``data:`` images), forms post to the service, and
#: no other site may frame a page.
CONTENT_SECURITY_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "font-src 'self'; connect-src 'self'; form-action 'self'; frame-ancestors 'none'; "
    "base-uri 'none'"
)
SECURITY_HEADERS: list[tuple[bytes, bytes]] = [
    (b"content-security-policy", CONTENT_SECURITY_POLICY.encode()),
    (b"x-frame-options", b"DENY"),
    (b"x-content-type-options", b"nosniff"),
    (b"referrer-policy", b"no-referrer"),
    (b"cross-origin-opener-policy", b"same-origin"),
]


class SecurityHeaders:
    """Adds :data:`SECURITY_HEADERS` to every HTTP answer (pages, API, errors), unless the
    route set one of them itself."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = list(message.get("headers", []))
                present = {bytes(k).lower() for k, _ in headers}
                headers.extend((k, v) for k, v in SECURITY_HEADERS if k not in present)
                message = {**message, "headers": headers}
            await send(message)

        await self.app(scope, receive, send_with_headers)
