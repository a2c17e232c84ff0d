"""Access control (issue 6): every route, with no token, a bad one, a revoked one, one of the
wrong role and one of the wrong model scope; tokens never stored in clear."""

from __future__ import annotations

import re
import secrets
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import create_engine, inspect, text

from service.api.deps import ROLE_ACTIONS, RouteInfo, app_routes
from service.store import tokens
from tests.databases import TEST_POLICY_TEXT, Api, snapshot_body

#: Routes that are not API routes: the schema and its documentation pages (public).
DOCUMENTATION = {"/openapi.json", "/docs", "/docs/oauth2-redirect", "/redoc"}

#: Routes whose object's model is not in the path: how each checks the model scope.
#: "object": answers 403 for an object of a model outside the scope; "filtered": answers, but
#: leaves out what is outside the scope; "global": not about models (needs an unscoped token).
SCOPE_RULE = {
    ("GET", "/v1/verdicts/{verdict_id}"): "object",
    ("GET", "/v1/verdicts/{verdict_id}/evidence"): "object",
    ("POST", "/v1/verdicts/{verdict_id}/override"): "object",
    ("GET", "/v1/audit"): "filtered",
    ("GET", "/ui/"): "filtered",
    ("GET", "/ui/verdicts/{verdict_id}"): "object",
    ("GET", "/ui/audit"): "filtered",
    ("GET", "/ui/report"): "filtered",
    ("POST", "/ui/report/replay"): "object",
    ("POST", "/ui/verdicts/{verdict_id}/override"): "object",
    ("GET", "/v1/models"): "filtered",
    ("GET", "/v1/policies"): "filtered",
    ("GET", "/metrics"): "filtered",
    ("GET", "/v1/tokens"): "global",
    ("POST", "/v1/tokens"): "global",
    ("DELETE", "/v1/tokens/{token_id}"): "global",
}

MODEL = "shelf-ranker"
OTHER = "also-read"


def operations(api: Api) -> list[tuple[str, RouteInfo]]:
    out = []
    for route in app_routes(api.app):
        for method in sorted(route.methods - {"HEAD"}):
            out.append((method, route))
    return out


class World:
    """Stored objects the walk addresses: a model with two verdicts, another model."""

    def __init__(self, api: Api) -> None:
        self.api = api
        first = api.post(MODEL, snapshot_body("k1", step=1))
        second = api.post(MODEL, snapshot_body("k2", step=2))
        other = api.post(OTHER, snapshot_body("o1", step=1))
        for r in (first, second, other):
            assert r.status_code == 201, r.text
        self.verdict_id = first.json()["verdict_id"]
        self.serial = 0
        for model, key in ((MODEL, "k1"), (OTHER, "o1")):  # an audit entry for each model
            pinned = api.client.put(
                f"/v1/models/{model}/reference",
                headers=api.headers(),
                json={"snapshot": key, "reason": "walk"},
            )
            assert pinned.status_code == 200, pinned.text

    def url(self, path: str) -> str:
        values = {
            "model": MODEL,
            "key": "k1",
            "verdict_id": str(self.verdict_id),
            "token_id": str(tokens_made(self.api)),
            "name": "tidegate.css",
        }
        return re.sub(r"\{(\w+)\}", lambda m: values[m.group(1)], path)

    def _admin_get(self, path: str) -> Any:
        return self.api.client.get(path, headers=self.api.headers()).json()

    def other_baseline(self) -> str:
        """A snapshot that is not the baseline now (setting the baseline it has is a 409)."""
        return "k1" if self._admin_get(f"/v1/models/{MODEL}")["baseline"] != "k1" else "k2"

    def other_decision(self) -> str:
        """The decision not in force for the verdict (overriding to the same one is a 409)."""
        now = self._admin_get(f"/v1/verdicts/{self.verdict_id}")["effective_decision"]
        return "hold" if now == "promote" else "promote"

    def form_token(self) -> str:
        page = self.api.client.get(f"/ui/models/{MODEL}", headers=self.api.headers()).text
        match = re.search(r'name="csrf_token" value="([^"]+)"', page)
        assert match
        return match.group(1)

    def body(self, method: str, path: str) -> tuple[str, dict[str, Any]] | None:
        """("json" | "form", a valid body) for routes that take one."""
        self.serial += 1
        if (method, path) == ("POST", "/v1/models/{model}/snapshots"):
            return "json", snapshot_body(f"walk-{self.serial}", step=10 + self.serial)
        if (method, path) == ("PUT", "/v1/models/{model}/baseline"):
            return "json", {"snapshot": self.other_baseline(), "reason": "walk"}
        if (method, path) == ("POST", "/v1/tokens"):
            return "json", {"role": "viewer", "models": ["x"]}
        if (method, path) == ("POST", "/v1/models/{model}/replay"):
            return "json", {"limit": 5}
        if (method, path) == ("PUT", "/v1/models/{model}/reference"):
            return "json", {"snapshot": "k1", "reason": "walk"}
        if (method, path) == ("POST", "/v1/verdicts/{verdict_id}/override"):
            return "json", {"decision": self.other_decision(), "reason": "walk"}
        if (method, path) == ("POST", "/ui/verdicts/{verdict_id}/override"):
            return "form", {
                "decision": self.other_decision(),
                "reason": "walk",
                "csrf_token": self.form_token(),
            }
        if (method, path) == ("POST", "/ui/models/{model}/baseline"):
            return "form", {
                "snapshot": self.other_baseline(),
                "reason": "walk",
                "csrf_token": self.form_token(),
            }
        if (method, path) == ("POST", "/ui/report/replay"):
            return "form", {
                "model": MODEL,
                "policy": TEST_POLICY_TEXT,
                "days": "7",
                "csrf_token": self.form_token(),
            }
        if (method, path) == ("POST", "/ui/sign-in"):
            return "form", {"token": "tg_x", "csrf_token": "x"}
        if (method, path) == ("POST", "/ui/sign-out"):
            return "form", {"csrf_token": "x"}
        return None

    def call(self, method: str, route: RouteInfo, token: str | None) -> Any:
        body = self.body(method, route.path)
        if route.dependant is not None and route.dependant.body_params and body is None:
            pytest.fail(f"{method} {route.path} takes a body: give a valid one in World.body")
        headers = {"Authorization": f"Bearer {token}"} if token is not None else {}
        kind, payload = body if body is not None else ("json", None)
        kwargs: dict[str, Any] = {"json": payload} if kind == "json" else {"data": payload}
        return self.api.client.request(
            method, self.url(route.path), headers=headers, follow_redirects=False, **kwargs
        )


def refused_without_sign_in(method: str, route: RouteInfo, response: Any) -> bool:
    """Pages: GET redirects to the sign-in page, a form answers 401; the API answers 401 with
    the JSON error and a WWW-Authenticate challenge."""
    if route.path.startswith("/ui/"):
        if method == "GET":
            return response.status_code == 303 and response.headers["location"].startswith(
                "/ui/sign-in?next="
            )
        return response.status_code == 401
    return (
        response.status_code == 401
        and response.json()["error"]["code"] == "unauthorized"
        and response.headers["www-authenticate"].startswith("Bearer")
    )


def tokens_made(api: Api) -> int:
    """A token id that exists (a throwaway viewer, made once per app)."""
    if not hasattr(api, "_victim"):
        made = api.client.post(
            "/v1/tokens", json={"role": "viewer", "models": ["x"]}, headers=api.headers()
        ).json()
        api._victim = made["id"]  # type: ignore[attr-defined]
    return int(api._victim)  # type: ignore[attr-defined]


def test_every_route_declares_its_access(api: Api) -> None:
    """A route added without an access declaration fails here."""
    undeclared = []
    for route in app_routes(api.app):
        if route.access is None:
            if route.path not in DOCUMENTATION and not route.path.startswith("/static"):
                undeclared.append(f"{route.path} is not an API route and not documentation")
        elif not route.access:
            undeclared.append(
                f"{sorted(route.methods)} {route.path} declares no access "
                "(add Allowed(action) or PUBLIC, see service/api/deps.py)"
            )
        elif "public" in route.access and len(route.access) > 1:
            undeclared.append(f"{route.path} is both public and protected")
    assert not undeclared, "\n".join(undeclared)


def test_every_route_refuses_callers_without_a_valid_token(api: Api) -> None:
    world = World(api)
    revoked = tokens_made(api)
    revoked_secret = api.client.post(
        "/v1/tokens", json={"role": "admin"}, headers=api.headers()
    ).json()
    assert (
        api.client.delete(f"/v1/tokens/{revoked_secret['id']}", headers=api.headers()).status_code
        == 200
    )
    assert revoked
    bad_tokens = {
        "none": None,
        "unknown": "tg_" + secrets.token_urlsafe(32),
        "malformed": "not-a-token",
        "revoked": revoked_secret["token"],
    }
    checked = 0
    for method, route in operations(api):
        if route.access is None:
            continue
        for label, token in bad_tokens.items():
            response = world.call(method, route, token)
            if route.access == ("public",):
                assert response.status_code < 500, (label, method, route.path)
                continue
            assert refused_without_sign_in(method, route, response), (
                label,
                method,
                route.path,
                response.status_code,
                response.text[:200],
            )
            checked += 1
    assert checked >= 4 * 22  # 22 protected operations today; more as routes are added


def test_every_route_checks_the_role(api: Api) -> None:
    world = World(api)
    role_tokens = {role: api.token(role) for role in ROLE_ACTIONS}
    refused = allowed = 0
    for method, route in operations(api):
        if not route.access or route.access == ("public",):
            continue
        (action,) = set(route.access)
        for role, token in role_tokens.items():
            response = world.call(method, route, token)
            if action in ROLE_ACTIONS[role]:
                assert response.status_code < 400, (role, method, route.path, response.text)
                allowed += 1
            else:
                assert response.status_code == 403, (role, method, route.path, response.text)
                if not route.path.startswith("/ui/"):
                    assert response.json()["error"]["code"] == "forbidden"
                refused += 1
    # every action is refused to some role, except reading, which every role may do
    assert refused >= 10 and allowed >= 15


def test_every_route_checks_the_model_scope(api: Api) -> None:
    world = World(api)
    scoped = {role: api.token(role, (OTHER,)) for role in ROLE_ACTIONS}
    checked = 0
    for method, route in operations(api):
        if not route.access or route.access == ("public",):
            continue
        (action,) = set(route.access)
        role = next(
            r for r in ("viewer", "trainer", "operator", "admin") if action in ROLE_ACTIONS[r]
        )
        token = scoped[role]
        response = world.call(method, route, token)
        if "{model}" in route.path:
            assert response.status_code == 403, (method, route.path, response.text)
            checked += 1
            continue
        rule = SCOPE_RULE.get((method, route.path))
        assert rule is not None, (
            f"{method} {route.path}: its object's model is not in the path; say in SCOPE_RULE "
            "how it checks the token's model scope, and make it do so"
        )
        if rule in {"object", "global"}:
            assert response.status_code == 403, (method, route.path, response.text)
        else:
            assert response.status_code == 200, (method, route.path, response.text)
            assert MODEL not in response.text, (method, route.path)
            assert OTHER in response.text, (method, route.path)
        checked += 1
    assert checked >= 10


def test_scope_patterns_and_posts_for_other_models(api: Api) -> None:
    trainer = api.token("trainer", ("shelf-*",))
    assert api.post("shelf-ranker", snapshot_body("a", step=1), trainer).status_code == 201
    assert api.post("shelf-2", snapshot_body("a", step=1), trainer).status_code == 201
    refused = api.post("also-read", snapshot_body("a", step=1), trainer)
    assert refused.status_code == 403
    assert refused.json()["error"]["field"] == "model"
    # nothing was stored for the refused post
    listing = api.client.get("/v1/models", headers=api.headers()).json()
    assert [m["name"] for m in listing["data"]] == ["shelf-2", "shelf-ranker"]
    # a reader scoped to shelf-* sees only those
    viewer = api.token("viewer", ("shelf-*",))
    seen = api.client.get("/v1/models", headers=api.headers(viewer)).json()
    assert seen["count"] == 2


def test_open_mode_lets_everyone_in_and_names_the_actor(make_api: Any) -> None:
    api = make_api(auth="open")
    for step, key in enumerate(("a", "b"), start=1):
        response = api.client.post(
            "/v1/models/m/snapshots",
            json=snapshot_body(key, step=step),
            headers={"X-Actor": "dana"},
        )
        assert response.status_code == 201
    put = api.client.put(
        "/v1/models/m/baseline", json={"snapshot": "a", "reason": "r"}, headers={"X-Actor": "dana"}
    )
    assert put.status_code == 200
    audit = api.client.get("/v1/audit", params={"model": "m"}).json()["data"]
    assert audit[0]["actor"] == "dana"
    assert api.client.get("/ui/").status_code == 200  # pages too, without signing in


def test_the_token_is_not_stored_in_clear(api: Api, tmp_path: Path) -> None:
    made = [api.admin]
    made += [api.token(role, ("shelf-*",)) for role in ROLE_ACTIONS]
    created = api.client.post("/v1/tokens", json={"role": "trainer"}, headers=api.headers())
    made.append(created.json()["token"])
    for secret in made:
        assert tokens.TOKEN_PATTERN.match(secret)
        # it works ...
        assert api.client.get("/v1/models", headers=api.headers(secret)).status_code == 200
    url = api.settings.database_url
    # ... and no byte of the database holds it (its SHA-256 is what is kept)
    if url.startswith("sqlite"):
        path = Path(url.removeprefix("sqlite:///"))
        blob = b"".join(p.read_bytes() for p in path.parent.glob(path.name + "*"))
        assert len(blob) > 10_000
    else:
        engine = create_engine(url)
        parts = []
        with engine.connect() as conn:
            for table in inspect(conn).get_table_names():
                for (row,) in conn.execute(text(f'SELECT t::text FROM "{table}" t')):
                    parts.append(row)
        engine.dispose()
        blob = "\n".join(parts).encode()
    for secret in made:
        assert secret.encode() not in blob
        assert secret[: tokens.SHOWN_CHARS].encode() in blob  # the shown prefix is
        assert tokens.digest(secret).encode() in blob


def test_token_digest_is_sha256_of_the_text() -> None:
    # FIPS 180-2, appendix B.1: SHA-256("abc")
    assert tokens.digest("abc") == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    )
    secret = tokens.new_secret()
    assert tokens.TOKEN_PATTERN.match(secret) and len(secret) == 46
    # 43 URL-safe base64 characters carry 32 bytes = 256 bits (RFC 4648 section 5)
    assert len(secrets.token_urlsafe(32)) == 43
