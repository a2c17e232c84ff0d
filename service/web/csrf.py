"""Form tokens against cross-site request forgery.

Every form carries a hidden ``csrf_token`` field filled by :func:`token_for`; every POST
handler calls :func:`verify` before it changes anything. This implementation gives each
running service one random token (a form from another site cannot know it); binding the token
to a signed-in session belongs with web sign-in.
"""

from __future__ import annotations

import hmac
import secrets

from fastapi import Request

from service.errors import Forbidden


def token_for(request: Request) -> str:
    """The token to put in the forms of a page answering *request*."""
    state = request.app.state
    token = getattr(state, "csrf_token", None)
    if token is None:
        token = secrets.token_urlsafe(32)
        state.csrf_token = token
    return str(token)


def verify(request: Request, token: str | None) -> None:
    """Raise Forbidden unless *token* is the one :func:`token_for` gives for *request*."""
    if not token or not hmac.compare_digest(token.encode(), token_for(request).encode()):
        raise Forbidden(
            "the form did not come from this service or is out of date; reload the page and "
            "submit again",
            code="csrf_failed",
            field="csrf_token",
        )
