"""Form tokens against cross-site request forgery.

Every form carries a hidden ``csrf_token`` field filled by :func:`token_for`; every POST
handler calls :func:`verify` before it changes anything.

* Signed in (a session cookie, see :mod:`service.web.auth`): the form token is an HMAC-SHA256
  of a fixed label keyed by the session's API token. Another site can neither read the cookie
  (HttpOnly) nor compute the HMAC without it; every worker and instance computes the same value,
  so no server-side state is needed.
* Not signed in (the sign-in form itself, and open mode): a random value in a cookie of its own,
  repeated in the form (the "double submit" pattern); a forged form cannot know the cookie.

Both cookies are ``SameSite=Strict``, so browsers do not send them with requests started by
another site at all; the form token is the second line of defence.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import secrets

from fastapi import Request
from starlette.responses import Response

from service.errors import Forbidden

#: The cookie of the double-submit token (used when not signed in).
FORM_COOKIE = "tidegate_form"
LABEL = b"tidegate form token v1"
_STATE = "csrf_new_cookie"


def _session_secret(request: Request) -> str | None:
    from service.web.auth import SESSION_COOKIE

    value = request.cookies.get(SESSION_COOKIE)
    return value or None


def _hmac_token(secret: str) -> str:
    mac = hmac.new(secret.encode("utf-8"), LABEL, hashlib.sha256).digest()
    return base64.urlsafe_b64encode(mac).decode().rstrip("=")


def token_for(request: Request) -> str:
    """The token to put in the forms of a page answering *request*."""
    secret = _session_secret(request)
    if secret is not None:
        return _hmac_token(secret)
    value = request.cookies.get(FORM_COOKIE) or getattr(request.state, _STATE, None)
    if not value:
        value = secrets.token_urlsafe(32)
        setattr(request.state, _STATE, value)  # attach() sets the cookie on the response
    return str(value)


def attach(request: Request, response: Response) -> Response:
    """Set the double-submit cookie on *response* when :func:`token_for` made a new one."""
    value = getattr(request.state, _STATE, None)
    if value:
        response.set_cookie(
            FORM_COOKIE,
            value,
            httponly=True,
            samesite="strict",
            secure=request.url.scheme == "https",
            path="/ui",
        )
    return response


def verify(request: Request, token: str | None) -> None:
    """Raise Forbidden unless *token* is the one :func:`token_for` gives for *request*."""
    secret = _session_secret(request)
    expected = _hmac_token(secret) if secret is not None else request.cookies.get(FORM_COOKIE)
    if not token or not expected or not hmac.compare_digest(token.encode(), expected.encode()):
        raise Forbidden(
            "the form did not come from this service or is out of date; reload the page and "
            "submit again",
            code="csrf_failed",
            field="csrf_token",
        )
