"""``GET /v1/models/{model}/serving`` (issue 11): the snapshot that serves, since when and what
made it serve, on SQLite and PostgreSQL; and posts without a sample."""

from __future__ import annotations

from typing import Any

from tests.databases import Api, snapshot_body


def serving(api: Api, model: str, **params: str) -> dict[str, Any]:
    answer = api.client.get(f"/v1/models/{model}/serving", params=params, headers=api.headers())
    assert answer.status_code == 200, answer.text
    return answer.json()  # type: ignore[no-any-return]


def audit_entry(api: Api, action: str) -> dict[str, Any]:
    entries = api.client.get("/v1/audit", headers=api.headers()).json()["data"]
    return next(e for e in entries if e["action"] == action)


def test_serving_names_the_snapshot_its_cause_and_the_audit_entry(api: Api) -> None:
    first = api.post("m", snapshot_body("s1", step=1)).json()
    now = serving(api, "m")
    assert (now["snapshot"], now["cause"], now["actor"]) == ("s1", "gate", "gate")
    assert now["verdict_id"] == first["verdict_id"] and first["serves_now"] is True
    assert now["audit_id"] == audit_entry(api, "baseline.verdict")["id"]
    assert now["since"] is not None and now["trained_until"] == "2026-12-01T00:30:00Z"

    held = api.post("m", snapshot_body("s2", step=2, shift=0.35, seed=8)).json()
    assert held["decision"] == "hold" and held["serves_now"] is False
    asked = serving(api, "m", snapshot="s2")
    assert asked["snapshot"] == "s1"
    assert asked["asked"] == {
        "snapshot": "s2",
        "state": "waiting",
        "verdict_id": held["verdict_id"],
        "decision": "hold",
        "effective_decision": "hold",
    }

    api.client.post(
        f"/v1/verdicts/{held['verdict_id']}/override",
        json={"decision": "promote", "reason": "known catalogue change"},
        headers=api.headers(),
    ).raise_for_status()
    now = serving(api, "m", snapshot="s2")
    assert (now["snapshot"], now["cause"], now["reason"]) == (
        "s2",
        "override",
        "known catalogue change",
    )
    assert now["actor"] == "test-admin" and now["verdict_id"] == held["verdict_id"]
    assert now["audit_id"] == audit_entry(api, "verdict.override")["id"]
    assert now["asked"]["state"] == "serves" and now["asked"]["effective_decision"] == "promote"
    # the retry of the held post now says it serves
    assert api.post("m", snapshot_body("s2", step=2, shift=0.35, seed=8)).json()["serves_now"]

    back = {"snapshot": "s1", "reason": "roll back"}
    api.client.put("/v1/models/m/baseline", json=back, headers=api.headers()).raise_for_status()
    now = serving(api, "m", snapshot="s2")
    assert (now["snapshot"], now["cause"], now["verdict_id"]) == ("s1", "rollback", None)
    assert now["audit_id"] == audit_entry(api, "baseline.rollback")["id"]
    assert now["asked"]["state"] == "waiting"  # s2 is newer than what serves

    ahead = {"snapshot": "s2", "reason": "forward again"}
    api.client.put("/v1/models/m/baseline", json=ahead, headers=api.headers()).raise_for_status()
    now = serving(api, "m", snapshot="s1")
    assert (now["snapshot"], now["cause"]) == ("s2", "manual")
    assert now["asked"]["state"] == "superseded"  # only a rollback brings s1 back


def test_an_unchanged_answer_is_a_bodiless_304(api: Api) -> None:
    api.post("m", snapshot_body("s1", step=1))
    url, headers = "/v1/models/m/serving", api.headers()
    first = api.client.get(url, headers=headers)
    tag = first.headers["etag"]
    assert tag.startswith('W/"') and first.headers["cache-control"] == "no-cache"
    # RFC 9110 §13.1.2: If-None-Match with a matching entity tag answers 304
    again = api.client.get(url, headers={**headers, "If-None-Match": tag})
    assert again.status_code == 304 and again.content == b"" and again.headers["etag"] == tag
    other = api.client.get(url, headers={**headers, "If-None-Match": 'W/"other"'})
    assert other.status_code == 200
    api.post("m", snapshot_body("s2", step=2, seed=9))
    changed = api.client.get(url, headers={**headers, "If-None-Match": tag})
    assert changed.status_code == 200 and changed.json()["snapshot"] == "s2"


def test_nothing_serves_yet_and_unknown_names(api: Api) -> None:
    few = snapshot_body("s1", step=1, rows=5)  # fewer rows than the test policy's 20: held
    assert api.post("m", few).json()["decision"] == "hold"
    now = serving(api, "m")
    assert now["snapshot"] is None and now["cause"] is None and now["since"] is None
    missing = api.client.get("/v1/models/nope/serving", headers=api.headers())
    assert missing.status_code == 404 and missing.json()["error"]["field"] == "model"
    unknown = api.client.get("/v1/models/m/serving?snapshot=s9", headers=api.headers())
    assert unknown.status_code == 404 and unknown.json()["error"]["field"] == "snapshot"


def test_a_post_needs_a_sample_with_rows_and_a_score(api: Api) -> None:
    bare = snapshot_body("s1", step=1)
    del bare["sample"]
    cases = [
        (bare, "sample"),
        ({**bare, "sample": {"score": []}}, "sample.score"),
        ({**bare, "sample": {"label": [0, 1]}}, "sample.score"),
    ]
    for body, field in cases:
        answer = api.post("m", body)
        assert answer.status_code == 422, answer.text
        assert answer.json()["error"]["field"] == field
    # nothing was stored: not even the model
    assert api.client.get("/v1/models/m", headers=api.headers()).status_code == 404
