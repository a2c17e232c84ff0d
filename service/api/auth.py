"""Who is calling: API tokens (``Authorization: Bearer tg_...``) or open mode.

Authentication happens twice over, on purpose:

* :class:`TokenGate`, a pure ASGI middleware, answers 401 to any request under ``/v1/`` or
  ``/metrics`` without a valid token *before the body is read*, so an unauthenticated caller can
  neither make the service parse a large body nor learn anything from validation errors;
* :func:`principal_for` (used by every route's :class:`~service.api.deps.Allowed` dependency)
  returns the caller found by the gate, or authenticates itself for routes outside those paths.

Authorisation (role and model scope) is the routes' business: see ``Allowed`` in
:mod:`service.api.deps`.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Awaitable, Callable, MutableMapping
from datetime import UTC, datetime
from typing import Any

import anyio.to_thread
from fastapi import Request

from service.api.deps import Database, Principal
from service.errors import Unauthorized
from service.settings import Settings
from service.store import tokens
from service.store.db import read_transaction, transaction
from service.store.tables import TokenRow

log = logging.getLogger("tidegate.auth")

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

#: Paths whose every request needs a token (checked before the body is read).
PROTECTED_PREFIXES = ("/v1/", "/metrics")
STATE_KEY = "principal"


def open_principal(actor_header: str | None) -> Principal:
    """Open mode: everyone may do everything; the audit name comes from ``X-Actor``."""
    name = (actor_header or "").strip()[:100] or "anonymous"
    return Principal(name=name)


def bearer_secret(authorization: str | None) -> str | None:
    """The token of an ``Authorization: Bearer <token>`` header, else None."""
    if not authorization:
        return None
    scheme, _, value = authorization.strip().partition(" ")
    if scheme.lower() != "bearer":
        return None
    return value.strip() or None


def lookup(database: Database, secret: str, *, now: datetime) -> Principal | None:
    """The principal of a live token, else None. Notes the time of use every few minutes."""
    with read_transaction(database.factory) as session:
        row = tokens.find_token(session, secret=secret)
        if row is None:
            return None
        principal = Principal(
            name=row.label or f"token-{row.id}",
            role=row.role,
            models=tuple(row.models or ()),
            token_id=row.id,
        )
        last = row.last_used_at
        if last is not None and last.tzinfo is None:
            last = last.replace(tzinfo=UTC)
        stale = last is None or now - last > tokens.LAST_USED_EVERY
    if stale:
        try:
            # a short wait: noting the use is not worth queueing behind a long post
            with transaction(database.factory, wait=1.0) as session:
                fresh = session.get(TokenRow, principal.token_id)
                if fresh is not None:
                    fresh.last_used_at = now
        except Exception:  # noting the time of use must never refuse a request
            log.warning("could not note the use of token %s", principal.token_id, exc_info=True)
    return principal


def authenticate(
    *, settings: Settings, database: Database, authorization: str | None, actor: str | None
) -> Principal:
    """The caller of a request with these headers; Unauthorized when no valid token."""
    if settings.auth == "open":
        return open_principal(actor)
    secret = bearer_secret(authorization)
    if secret is None:
        raise Unauthorized("an API token is required: send 'Authorization: Bearer <token>'")
    principal = lookup(database, secret, now=datetime.now(UTC))
    if principal is None:
        raise Unauthorized("the API token is not valid (unknown or revoked)")
    return principal


def principal_for(request: Request) -> Principal:
    """The caller of *request* (found by :class:`TokenGate`, or authenticated here)."""
    found = request.scope.get("state", {}).get(STATE_KEY)
    if isinstance(found, Principal):
        return found
    principal = authenticate(
        settings=request.app.state.settings,
        database=request.app.state.database,
        authorization=request.headers.get("authorization"),
        actor=request.headers.get("x-actor"),
    )
    request.scope.setdefault("state", {})[STATE_KEY] = principal
    return principal


def header(scope: Scope, name: bytes) -> str | None:
    """The first value of header *name* (lower-case bytes) in an ASGI scope, or None."""
    for key, value in scope.get("headers", []):
        if key.lower() == name:
            return bytes(value).decode("latin-1")
    return None


class TokenGate:
    """Pure ASGI middleware: 401 for protected paths without a valid token, before the body."""

    def __init__(self, app: ASGIApp, *, settings: Settings, database: Database) -> None:
        self.app = app
        self.settings = settings
        self.database = database

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        path = scope.get("path", "") if scope["type"] == "http" else ""
        if self.settings.auth == "open" or not path.startswith(PROTECTED_PREFIXES):
            await self.app(scope, receive, send)
            return
        authorization = header(scope, b"authorization")
        try:
            principal = await anyio.to_thread.run_sync(
                lambda: authenticate(
                    settings=self.settings,
                    database=self.database,
                    authorization=authorization,
                    actor=None,
                )
            )
        except Unauthorized as exc:
            body = json.dumps(exc.body()).encode("utf-8")
            await send(
                {
                    "type": "http.response.start",
                    "status": 401,
                    "headers": [
                        (b"content-type", b"application/json"),
                        (b"content-length", str(len(body)).encode()),
                        (b"www-authenticate", b'Bearer realm="tidegate"'),
                    ],
                }
            )
            await send({"type": "http.response.body", "body": body})
            return
        scope.setdefault("state", {})[STATE_KEY] = principal
        await self.app(scope, receive, send)
