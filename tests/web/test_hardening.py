"""Hardened answers (issue 12): security headers on every page and API answer, a sign-in form
that a planted cookie cannot forge, and API docs served from the service's own files."""

from __future__ import annotations

import pytest

from service.api.middleware import CONTENT_SECURITY_POLICY
from tests.databases import Api, snapshot_body
from tests.web.test_sign_in import browser, form_token


@pytest.mark.parametrize(
    "path", ["/ui/sign-in", "/ui/models/shelf-ranker", "/v1/models", "/docs", "/nowhere"]
)
def test_every_answer_carries_the_security_headers(api: Api, path: str) -> None:
    assert api.post("shelf-ranker", snapshot_body("s1", step=1)).status_code == 201
    answer = api.client.get(path, headers=api.headers(), follow_redirects=False)
    assert answer.status_code in (200, 303, 404)
    # OWASP Secure Headers Project, recommended values (from memory): DENY, nosniff,
    # no-referrer; CSP Level 3 (W3C): frame-ancestors 'none' forbids every framing
    assert answer.headers["x-frame-options"] == "DENY"
    assert answer.headers["x-content-type-options"] == "nosniff"
    assert answer.headers["referrer-policy"] == "no-referrer"
    csp = answer.headers["content-security-policy"]
    assert csp == CONTENT_SECURITY_POLICY
    directives = dict(
        (part.strip().split(" ", 1) + [""])[:2] for part in csp.split(";") if part.strip()
    )
    assert directives["frame-ancestors"] == "'none'"
    assert directives["script-src"] == "'self'"  # no 'unsafe-inline', no other site
    assert "unsafe-inline" not in csp and "unsafe-eval" not in csp


def test_pages_hold_no_inline_script(api: Api) -> None:
    """Under the policy above an inline script would not run; none is written."""
    assert api.post("shelf-ranker", snapshot_body("s1", step=1)).status_code == 201
    for path in ("/ui/", "/ui/models/shelf-ranker", "/ui/sign-in", "/docs"):
        html = api.client.get(path, headers=api.headers()).text
        for tag in html.split("<script")[1:]:
            head = tag.split(">", 1)[0]
            assert "src=" in head, f"{path}: an inline script"
        assert " on" + "click=" not in html and "javascript:" not in html


def test_a_planted_form_cookie_cannot_sign_anyone_in(api: Api) -> None:
    """Login CSRF: someone who can set a cookie for the site (a sibling subdomain) plants a
    form cookie of their choosing and posts a form with the same value, to sign the victim in
    as themselves. The form value must be signed by the service's secret, so it fails."""
    victim = browser(api)
    victim.cookies.set("tidegate_form", "planted-value", path="/ui")
    forged = victim.post(
        "/ui/sign-in", data={"token": api.admin, "csrf_token": "planted-value", "next": "/ui/"}
    )
    assert forged.status_code == 403
    assert "tidegate_session" not in forged.headers.get("set-cookie", "")
    # the page the service itself hands out (same planted cookie) carries a signed value that
    # is not the cookie, and that one works
    page = victim.get("/ui/sign-in")
    token = form_token(page.text)
    assert token != "planted-value"
    done = victim.post("/ui/sign-in", data={"token": api.admin, "csrf_token": token})
    assert done.status_code == 303


def test_the_form_key_is_shared_by_every_app_on_the_database(make_api: object) -> None:
    """Two apps (two workers) on one database sign the form the same way."""
    first = make_api()  # type: ignore[operator]
    second = make_api()  # type: ignore[operator]
    page = browser(first).get("/ui/sign-in")
    cookie = page.cookies.get("tidegate_form")
    other = browser(second)
    other.cookies.set("tidegate_form", cookie, path="/ui")
    done = other.post(
        "/ui/sign-in", data={"token": first.admin, "csrf_token": form_token(page.text)}
    )
    assert done.status_code == 303


def test_docs_are_served_from_the_service(api: Api) -> None:
    page = api.client.get("/docs")
    assert page.status_code == 200
    sources = [
        part.split('"', 2)[1]
        for part in page.text.split(" src=")[1:] + page.text.split(" href=")[1:]
    ]
    assert sources and all(s.startswith("/docs/assets/") for s in sources), sources
    for source in sources:
        asset = api.client.get(source)
        assert asset.status_code == 200 and len(asset.content) > 50, source
    bundle = api.client.get("/docs/assets/swagger-ui-bundle.js")
    assert bundle.headers["content-type"].startswith("text/javascript")
    assert api.client.get("/docs/assets/..%2Fsettings.py").status_code == 404
    assert api.client.get("/docs/assets/index.html").status_code == 404
    assert api.client.get("/redoc").status_code == 404
