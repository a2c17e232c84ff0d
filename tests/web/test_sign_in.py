"""Web sign-in (issue 6): pages use the API's roles; a token pasted once is kept in an HttpOnly,
SameSite=Strict cookie; forms carry a CSRF token bound to the session."""

from __future__ import annotations

import re
from typing import Any

import pytest
from fastapi.testclient import TestClient

from tests.databases import Api, snapshot_body


def form_token(html: str) -> str:
    match = re.search(r'name="csrf_token" value="([^"]+)"', html)
    assert match, "no csrf_token in the page"
    return match.group(1)


@pytest.fixture
def site(api: Api) -> Api:
    for step, key in enumerate(("s1", "s2"), start=1):
        assert api.post("shelf-ranker", snapshot_body(key, step=step)).status_code == 201
    return api


def browser(api: Api) -> TestClient:
    """A client with no token header: like a browser, it has only its cookies."""
    return TestClient(api.app, raise_server_exceptions=False, follow_redirects=False)


def sign_in(client: TestClient, token: str, next_url: str = "/ui/") -> Any:
    page = client.get("/ui/sign-in", params={"next": next_url})
    assert page.status_code == 200
    return client.post(
        "/ui/sign-in", data={"token": token, "next": next_url, "csrf_token": form_token(page.text)}
    )


def cookie_header(response: Any, name: str) -> str:
    found = [
        v
        for k, v in response.headers.multi_items()
        if k == "set-cookie" and v.startswith(name + "=")
    ]
    assert found, f"no {name} cookie set"
    return found[0]


def test_pages_ask_to_sign_in_and_the_session_cookie_is_guarded(site: Api) -> None:
    client = browser(site)
    first = client.get("/ui/models/shelf-ranker")
    assert first.status_code == 303
    assert first.headers["location"] == "/ui/sign-in?next=%2Fui%2Fmodels%2Fshelf-ranker"
    page = client.get("/ui/sign-in", params={"next": "/ui/models/shelf-ranker"})
    form = cookie_header(page, "tidegate_form")
    assert "HttpOnly" in form and "SameSite=strict" in form and "Path=/ui" in form

    viewer = site.token("viewer", ("shelf-*",))
    done = sign_in(client, viewer, "/ui/models/shelf-ranker")
    assert done.status_code == 303 and done.headers["location"] == "/ui/models/shelf-ranker"
    session = cookie_header(done, "tidegate_session")
    for attribute in ("HttpOnly", "SameSite=strict", "Path=/ui", "Max-Age=43200"):
        assert attribute in session
    assert "Secure" not in session  # plain http in tests; set when the page came over https

    shown = client.get("/ui/models/shelf-ranker")
    assert shown.status_code == 200 and "(viewer)" in shown.text
    assert "Sign out" in shown.text
    # the session cookie is for pages only: the API still wants the token itself
    assert client.get("/v1/models").status_code == 401


def test_wrong_form_token_or_token_is_refused(site: Api) -> None:
    client = browser(site)
    client.get("/ui/sign-in")
    forged = client.post("/ui/sign-in", data={"token": site.admin, "csrf_token": "guess"})
    assert forged.status_code == 403 and "tidegate_session" not in forged.headers.get(
        "set-cookie", ""
    )
    bad = sign_in(client, "tg_" + "x" * 43)
    assert bad.status_code == 401 and "not valid" in bad.text
    # a page cannot be signed into from another site's form: no form cookie, no sign-in
    stranger = browser(site)
    refused = stranger.post("/ui/sign-in", data={"token": site.admin, "csrf_token": ""})
    assert refused.status_code == 403


@pytest.mark.parametrize(
    "target", ["https://elsewhere.example/", "//elsewhere.example/", "/v1/tokens", "/ui\\..\\x"]
)
def test_sign_in_never_redirects_away(site: Api, target: str) -> None:
    done = sign_in(browser(site), site.admin, target)
    assert done.status_code == 303 and done.headers["location"] == "/ui/"


def test_roles_and_scope_apply_to_pages_and_forms(site: Api) -> None:
    viewer = browser(site)
    sign_in(viewer, site.token("viewer"))
    page = viewer.get("/ui/models/shelf-ranker/snapshots/s1")
    assert page.status_code == 200 and "/override" not in page.text
    denied = viewer.post(
        "/ui/models/shelf-ranker/baseline",
        data={"snapshot": "s1", "reason": "x", "csrf_token": form_token(page.text)},
    )
    assert denied.status_code == 403 and "<html" in denied.text.lower()

    scoped = browser(site)
    sign_in(scoped, site.token("operator", ("also-*",)))
    assert scoped.get("/ui/models/shelf-ranker").status_code == 403
    assert ">shelf-ranker<" not in scoped.get("/ui/").text

    operator = browser(site)
    sign_in(operator, site.token("operator", ("shelf-*",)))
    page = operator.get("/ui/models/shelf-ranker")
    token = form_token(page.text)
    assert token != form_token(viewer.get("/ui/models/shelf-ranker").text)  # per session
    missing = operator.post(
        "/ui/models/shelf-ranker/baseline", data={"snapshot": "s1", "reason": "roll back"}
    )
    assert missing.status_code == 403 and "csrf_failed" in missing.text
    other_session = operator.post(
        "/ui/models/shelf-ranker/baseline",
        data={
            "snapshot": "s1",
            "reason": "roll back",
            "csrf_token": form_token(viewer.get("/ui/").text),
        },
    )
    assert other_session.status_code == 403
    moved = operator.post(
        "/ui/models/shelf-ranker/baseline",
        data={"snapshot": "s1", "reason": "roll back", "csrf_token": token},
    )
    assert moved.status_code == 303
    model = site.client.get("/v1/models/shelf-ranker", headers=site.headers()).json()
    assert model["baseline"] == "s1"


def test_revoking_the_token_ends_the_session_and_sign_out_clears_it(site: Api) -> None:
    client = browser(site)
    made = site.client.post("/v1/tokens", json={"role": "viewer"}, headers=site.headers())
    sign_in(client, made.json()["token"])
    page = client.get("/ui/")
    assert page.status_code == 200
    out = client.post("/ui/sign-out", data={"csrf_token": form_token(page.text)})
    assert out.status_code == 303 and out.headers["location"] == "/ui/sign-in"
    assert 'tidegate_session=""' in cookie_header(out, "tidegate_session")
    assert client.get("/ui/").status_code == 303

    sign_in(client, made.json()["token"])
    assert client.get("/ui/").status_code == 200
    site.client.delete(f"/v1/tokens/{made.json()['id']}", headers=site.headers())
    assert client.get("/ui/").status_code == 303  # checked on every page
