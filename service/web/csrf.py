"""Form tokens against cross-site request forgery.

Every form carries a hidden ``csrf_token`` field filled by :func:`token_for`; every POST
handler calls :func:`verify` before it changes anything.

* Signed in (a session cookie, see :mod:`service.web.auth`): the form token is an HMAC-SHA256
  of a fixed label keyed by the session's API token. Another site can neither read the cookie
  (HttpOnly) nor compute the HMAC without it; every worker and instance computes the same value,
  so no server-side state is needed.
* Not signed in (the sign-in form itself, and open mode): a random value in a cookie of its own,
  and in the form its HMAC-SHA256 keyed by a secret of the service (made at first use and kept
  in the database, so every worker and instance shares it; see ``service_keys``). A forged form
  cannot know the cookie; and a cookie planted by someone who can set cookies for the site
  (a sibling subdomain, a plain-HTTP answer) does not help either, since the form value must
  be signed by the service: the sign-in form cannot be forged to sign a person in as someone
  else ("login CSRF").

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


#: Name of the service key that signs the form cookie (``service_keys`` table).
FORM_KEY = "form-signing"
_KEY_CACHE = "form_signing_key"


def _service_key(request: Request) -> bytes:
    """The service's form-signing secret (read once per process, made at first use)."""
    cached = getattr(request.app.state, _KEY_CACHE, None)
    if isinstance(cached, bytes):
        return cached
    from datetime import UTC, datetime

    from service.store import repo

    with request.app.state.database.transaction() as session:
        value = repo.service_key(
            session,
            name=FORM_KEY,
            make=lambda: secrets.token_urlsafe(48),
            now=datetime.now(UTC),
        )
    key = value.encode("utf-8")
    setattr(request.app.state, _KEY_CACHE, key)
    return key


def _signed(request: Request, nonce: str) -> str:
    mac = hmac.new(_service_key(request), LABEL + b"|" + nonce.encode(), hashlib.sha256)
    return base64.urlsafe_b64encode(mac.digest()).decode().rstrip("=")


def token_for(request: Request) -> str:
    """The token to put in the forms of a page answering *request*."""
    secret = _session_secret(request)
    if secret is not None:
        return _hmac_token(secret)
    value = request.cookies.get(FORM_COOKIE) or getattr(request.state, _STATE, None)
    if not value:
        value = secrets.token_urlsafe(32)
        setattr(request.state, _STATE, value)  # attach() sets the cookie on the response
    return _signed(request, str(value))


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
    cookie = request.cookies.get(FORM_COOKIE)
    if secret is not None:
        expected: str | None = _hmac_token(secret)
    else:
        expected = _signed(request, cookie) if cookie else None
    if not token or not expected or not hmac.compare_digest(token.encode(), expected.encode()):
        raise Forbidden(
            "the form did not come from this service or is out of date; reload the page and "
            "submit again",
            code="csrf_failed",
            field="csrf_token",
        )
