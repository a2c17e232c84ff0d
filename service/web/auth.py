"""Who is looking at a page: sign-in with an API token, kept in a session cookie.

The pages use the API's roles and model scopes (:mod:`service.api.deps`). A person signs in at
``/ui/sign-in`` by pasting an API token; the service checks it and keeps it in a cookie that is
``HttpOnly`` (scripts cannot read it), ``SameSite=Strict`` (browsers do not send it with requests
started by another site), ``Secure`` when the page came over HTTPS, scoped to ``/ui`` and good
for :data:`SESSION_HOURS` hours. Every page re-checks the token, so revoking it ends the session
at once. Forms carry a CSRF token (:mod:`service.web.csrf`). A page asked for without a valid
session redirects to the sign-in page; a form posted without one answers 401.

In open mode nobody signs in (the caller is named by ``X-Actor``, as in the API). A request
with ``Authorization: Bearer`` (a script) is authenticated by its token like an API call.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Annotated, Any
from urllib.parse import quote

from fastapi import APIRouter, Depends, Form, Query, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.api.auth import authenticate, lookup, open_principal
from service.api.deps import PUBLIC, Allowed, Principal
from service.errors import Forbidden, TidegateError, Unauthorized

SESSION_COOKIE = "tidegate_session"
SESSION_HOURS = 12
STATE_KEY = "web_principal"

router = APIRouter(prefix="/ui", include_in_schema=False, dependencies=[Depends(PUBLIC)])


class SignInNeeded(Unauthorized):
    """No valid session: pages redirect to the sign-in page."""


class PageForbidden(Forbidden):
    """The role or model scope does not allow this page or form (an HTML page, 403)."""


def get_web_principal(request: Request) -> Principal:
    """The caller of a page or a form (cached on the request)."""
    cached = getattr(request.state, STATE_KEY, None)
    if isinstance(cached, Principal):
        return cached
    settings = request.app.state.settings
    database = request.app.state.database
    if settings.auth == "open":
        principal = open_principal(request.headers.get("x-actor"))
    elif request.headers.get("authorization"):
        try:
            principal = authenticate(
                settings=settings,
                database=database,
                authorization=request.headers.get("authorization"),
                actor=None,
            )
        except Unauthorized as exc:
            raise SignInNeeded(exc.message) from None
    else:
        secret = request.cookies.get(SESSION_COOKIE)
        found = lookup(database, secret, now=datetime.now(UTC)) if secret else None
        if found is None:
            raise SignInNeeded(
                "sign in with an API token"
                if not secret
                else "your session has ended (the token was revoked?): sign in again"
            )
        principal = found
    setattr(request.state, STATE_KEY, principal)
    return principal


class WebAllowed(Allowed):
    """Page dependency declaring the action a page or form needs (see ``Allowed``); refusals
    become HTML pages."""

    def __call__(
        self, request: Request, principal: Annotated[Principal, Depends(get_web_principal)]
    ) -> Principal:
        model = request.path_params.get("model")
        try:
            principal.require(self.action, model if isinstance(model, str) else None)
        except Forbidden as exc:
            raise PageForbidden(exc.message, field=exc.field) from None
        return principal


def safe_next(target: str | None) -> str:
    """Only our own pages: no scheme, no host, no ``//`` (an open redirect otherwise)."""
    if not target or not target.startswith("/ui/") or target.startswith("//") or "\\" in target:
        return "/ui/"
    return target


async def page_error(request: Request, exc: Exception) -> Response:
    """Refusals raised by page dependencies: GET without a session -> the sign-in page; the
    rest -> the HTML error page with the API's status and code."""
    assert isinstance(exc, TidegateError)
    if isinstance(exc, SignInNeeded) and request.method in {"GET", "HEAD"}:
        target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        return RedirectResponse(f"/ui/sign-in?next={quote(target, safe='')}", status_code=303)
    from service.web import routes

    principal = getattr(request.state, STATE_KEY, None) or Principal(
        name="not signed in", role="none", models=()
    )
    return routes.error_page(request, exc, principal, request.app.state.clock())


def is_page(request: Request) -> bool:
    """Whether *request* asks for an on-call page (answered in HTML) rather than the API."""
    path = request.url.path
    return path == "/ui" or path.startswith("/ui/")


def install(app: Any) -> None:
    """Register the HTML handlers of page refusals, and HTML pages for any other error under
    ``/ui/`` (an unknown page, a malformed query); the API's errors stay JSON."""
    app.add_exception_handler(SignInNeeded, page_error)
    app.add_exception_handler(PageForbidden, page_error)
    for kind in (StarletteHTTPException, RequestValidationError):
        app.add_exception_handler(kind, _page_or_api(app.exception_handlers[kind]))


def _page_or_api(api_handler: Any) -> Any:
    async def handle(request: Request, exc: Exception) -> Response:
        if not is_page(request):
            response: Response = await api_handler(request, exc)
            return response
        if isinstance(exc, StarletteHTTPException):
            status = exc.status_code
            message = f"no page at {request.url.path}" if status == 404 else str(exc.detail)
        else:
            status, message = 422, "the address has a value this page cannot read"
            if isinstance(exc, RequestValidationError) and exc.errors():
                first = exc.errors()[0]
                where = ".".join(str(x) for x in first.get("loc", ()))
                message = f"{where}: {first.get('msg', 'invalid value')}"
        error = TidegateError(message)
        error.status = status
        error.code = {404: "not_found", 405: "method_not_allowed"}.get(status, "invalid_request")
        return await page_error(request, error)

    return handle


def _sign_in_page(
    request: Request, *, next_url: str, error: str | None = None, status: int = 200
) -> Response:
    from service.web import routes

    principal = Principal(name="not signed in", role="none", models=())
    return routes.render(
        request,
        "sign_in.html",
        {"next_url": next_url, "error": error},
        principal,
        request.app.state.clock(),
        status,
    )


@router.get("/sign-in", response_class=HTMLResponse)
def sign_in_page(
    request: Request, next: Annotated[str | None, Query(max_length=2000)] = None
) -> Response:
    return _sign_in_page(request, next_url=safe_next(next))


@router.post("/sign-in", response_class=HTMLResponse)
def sign_in(
    request: Request,
    token: Annotated[str, Form(max_length=200)] = "",
    csrf_token: Annotated[str, Form(max_length=200)] = "",
    next: Annotated[str, Form(max_length=2000)] = "/ui/",
) -> Response:
    from service.web import csrf

    target = safe_next(next)
    try:
        csrf.verify(request, csrf_token)
    except Forbidden as exc:
        return _sign_in_page(request, next_url=target, error=exc.message, status=403)
    principal = (
        lookup(request.app.state.database, token.strip(), now=datetime.now(UTC))
        if token.strip()
        else None
    )
    if principal is None:
        return _sign_in_page(
            request,
            next_url=target,
            status=401,
            error="that token is not valid (unknown or revoked)",
        )
    response = RedirectResponse(target, status_code=303)
    response.set_cookie(
        SESSION_COOKIE,
        token.strip(),
        max_age=SESSION_HOURS * 3600,
        httponly=True,
        samesite="strict",
        secure=request.url.scheme == "https",
        path="/ui",
    )
    return response


@router.post("/sign-out")
def sign_out(request: Request, csrf_token: Annotated[str, Form(max_length=200)] = "") -> Response:
    from service.web import csrf

    try:
        csrf.verify(request, csrf_token)
    except Forbidden as exc:
        raise PageForbidden(exc.message, code=exc.code, field=exc.field) from None
    response = RedirectResponse("/ui/sign-in", status_code=303)
    response.delete_cookie(SESSION_COOKIE, path="/ui", httponly=True, samesite="strict")
    return response
