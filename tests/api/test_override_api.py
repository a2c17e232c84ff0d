"""Overrides, roll-back and the audit log through the HTTP API (issue 5, part 2)."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from service.api.deps import Principal, get_principal
from tests.oncall_support import Harness, harness, snapshot_body


@pytest.fixture
def h(tmp_path: Path) -> Iterator[Harness]:
    with harness(tmp_path) as ready:
        yield ready


def baseline(h: Harness, model: str = "shelf-ranker") -> str | None:
    return h.http.get(f"/v1/models/{model}").json()["baseline"]  # type: ignore[no-any-return]


def override(
    h: Harness, verdict_id: int, decision: str, reason: str = "known change", actor: str = "alice"
) -> httpx.Response:
    return h.http.post(
        f"/v1/verdicts/{verdict_id}/override",
        json={"decision": decision, "reason": reason},
        headers={"X-Actor": actor},
    )


def test_scenario_holds_s04_against_s03(h: Harness) -> None:
    assert h.verdicts["s04"]["decision"] == "hold"
    assert baseline(h) == "s03"


def test_override_hold_to_promote_is_stored_with_actor_and_time(h: Harness) -> None:
    vid = h.verdicts["s04"]["verdict_id"]
    response = override(h, vid, "promote", "planned catalogue relaunch")
    assert response.status_code == 201, response.text
    body = response.json()
    assert body["override"]["actor"] == "alice"
    assert body["override"]["reason"] == "planned catalogue relaunch"
    assert body["override"]["created_at"] == h.clock.now.isoformat().replace("+00:00", "Z")
    assert (body["decision_before"], body["baseline_before"], body["baseline_after"]) == (
        "hold",
        "s03",
        "s04",
    )
    assert body["baseline_moved"] is True


def test_override_to_promote_moves_baseline_and_keeps_original_verdict(h: Harness) -> None:
    vid = h.verdicts["s04"]["verdict_id"]
    before = h.http.get(f"/v1/verdicts/{vid}").json()
    override(h, vid, "promote")
    after = h.http.get(f"/v1/verdicts/{vid}").json()
    assert baseline(h) == "s04"
    # the gate's verdict is untouched: decision, reasons, findings, moved_baseline
    for field in ("decision", "reasons", "findings", "moved_baseline", "created_at"):
        assert after[field] == before[field], field
    assert after["decision"] == "hold"
    assert after["effective_decision"] == "promote"
    assert after["overridden"] is True
    assert [o["decision"] for o in after["overrides"]] == ["promote"]
    # the promotion is recorded with cause "override"
    evidence = h.http.get(f"/v1/verdicts/{vid}/evidence").json()
    assert evidence["candidate_serving"] is True
    assert evidence["promotions"][0]["cause"] == "override"
    assert evidence["promotions"][0]["previous"] == "s03"


def test_override_shows_in_model_list_and_verdict_list(h: Harness) -> None:
    vid = h.verdicts["s04"]["verdict_id"]
    override(h, vid, "promote")
    models = {m["name"]: m for m in h.http.get("/v1/models").json()["data"]}
    last = models["shelf-ranker"]["last_verdict"]
    assert (last["decision"], last["effective_decision"], last["overridden"]) == (
        "hold",
        "promote",
        True,
    )
    assert models["shelf-ranker"]["consecutive_holds"] == 0
    listed = h.http.get("/v1/models/shelf-ranker/verdicts").json()["data"][0]
    assert listed["snapshot"] == "s04" and listed["effective_decision"] == "promote"


def test_audit_entry_has_who_what_when_before_after(h: Harness) -> None:
    vid = h.verdicts["s04"]["verdict_id"]
    override(h, vid, "promote", "planned catalogue relaunch", actor="bob")
    entry = h.http.get("/v1/audit", params={"model": "shelf-ranker", "limit": 1}).json()["data"][0]
    assert entry["actor"] == "bob"
    assert entry["action"] == "verdict.override"
    assert entry["target"] == f"verdict {vid} (s04)"
    assert entry["at"] == h.clock.now.isoformat().replace("+00:00", "Z")
    assert entry["before"] == {"decision": "hold", "baseline": "s03"}
    assert entry["after"]["decision"] == "promote" and entry["after"]["baseline"] == "s04"
    assert entry["reason"] == "planned catalogue relaunch"


def test_override_promote_back_to_hold_returns_previous_baseline(h: Harness) -> None:
    vid = h.verdicts["s04"]["verdict_id"]
    override(h, vid, "promote")
    h.clock.advance(minutes=3)
    body = override(h, vid, "hold", "relaunch postponed").json()
    assert (body["baseline_before"], body["baseline_after"]) == ("s04", "s03")
    assert baseline(h) == "s03"
    detail = h.http.get(f"/v1/verdicts/{vid}").json()
    assert [o["decision"] for o in detail["overrides"]] == ["promote", "hold"]
    assert detail["effective_decision"] == "hold" and detail["decision"] == "hold"


def test_override_of_serving_promote_rolls_back(h: Harness) -> None:
    vid = h.verdicts["s03"]["verdict_id"]
    body = override(h, vid, "hold", "complaints from the shop floor").json()
    assert (body["decision_before"], body["baseline_before"], body["baseline_after"]) == (
        "promote",
        "s03",
        "s02",
    )
    assert baseline(h) == "s02"


def test_override_of_promote_that_no_longer_serves_keeps_baseline(h: Harness) -> None:
    vid = h.verdicts["s02"]["verdict_id"]
    body = override(h, vid, "hold").json()
    assert body["baseline_moved"] is False
    assert "does not serve" in body["note"]
    assert baseline(h) == "s03"


def test_override_of_first_snapshot_has_nothing_to_return_to(h: Harness) -> None:
    vid = h.verdicts["a02"]["verdict_id"]
    override(h, vid, "hold")  # a02 -> a01
    assert baseline(h, "also-read") == "a01"
    body = override(h, h.verdicts["a01"]["verdict_id"], "hold").json()
    assert body["baseline_moved"] is False
    assert "keeps serving" in body["note"]
    assert baseline(h, "also-read") == "a01"


def test_override_of_old_hold_does_not_replace_newer_baseline(h: Harness) -> None:
    vid = h.verdicts["s04"]["verdict_id"]
    h.clock.advance(minutes=15)
    newer = h.http.post("/v1/models/shelf-ranker/snapshots", json=snapshot_body("s05", 7)).json()
    assert newer["decision"] == "promote" and baseline(h) == "s05"
    body = override(h, vid, "promote").json()
    assert body["baseline_moved"] is False and "newer snapshot" in body["note"]
    assert baseline(h) == "s05"


def test_override_to_decision_in_force_is_409_and_stores_nothing(h: Harness) -> None:
    vid = h.verdicts["s04"]["verdict_id"]
    response = override(h, vid, "hold")
    assert response.status_code == 409
    assert response.json()["error"]["code"] == "conflict"
    assert h.http.get(f"/v1/verdicts/{vid}").json()["overrides"] == []
    assert (
        h.http.get("/v1/audit", params={"model": "shelf-ranker"}).json()["data"][0]["action"]
        != "verdict.override"
    )


@pytest.mark.parametrize(
    "body, field",
    [
        ({"decision": "promote"}, "reason"),
        ({"decision": "promote", "reason": ""}, "reason"),
        ({"decision": "promote", "reason": "   "}, "reason"),
        ({"decision": "ship-it", "reason": "x"}, "decision"),
        ({"decision": "promote", "reason": "x", "extra": 1}, "extra"),
    ],
)
def test_override_bad_body_is_422_and_stores_nothing(
    h: Harness, body: dict[str, object], field: str
) -> None:
    vid = h.verdicts["s04"]["verdict_id"]
    response = h.http.post(f"/v1/verdicts/{vid}/override", json=body)
    assert response.status_code == 422
    error = response.json()["error"]
    assert error["code"] == "invalid_request" and error["field"] == field
    assert h.http.get(f"/v1/verdicts/{vid}").json()["overrides"] == []
    assert baseline(h) == "s03"


def test_override_unknown_verdict_is_404(h: Harness) -> None:
    response = override(h, 9999, "promote")
    assert response.status_code == 404
    assert response.json()["error"] == {
        "code": "not_found",
        "message": "no verdict 9999",
        "field": "verdict_id",
        "details": [],
    }


def test_viewer_may_read_but_not_override_or_roll_back(h: Harness) -> None:
    h.app.dependency_overrides[get_principal] = lambda: Principal("vera", role="viewer")
    try:
        vid = h.verdicts["s04"]["verdict_id"]
        response = override(h, vid, "promote")
        assert response.status_code == 403
        assert response.json()["error"]["code"] == "forbidden"
        rollback = h.http.put(
            "/v1/models/shelf-ranker/baseline", json={"snapshot": "s01", "reason": "x"}
        )
        assert rollback.status_code == 403
        assert h.http.get(f"/v1/verdicts/{vid}/evidence").status_code == 200
        assert h.http.get("/v1/audit").status_code == 200
    finally:
        h.app.dependency_overrides.clear()
    assert baseline(h) == "s03"
    assert h.http.get(f"/v1/verdicts/{vid}").json()["overrides"] == []


def test_operator_scoped_to_other_models_is_403(h: Harness) -> None:
    h.app.dependency_overrides[get_principal] = lambda: Principal(
        "otto", role="operator", models=("also-*",)
    )
    try:
        assert override(h, h.verdicts["s04"]["verdict_id"], "promote").status_code == 403
        assert override(h, h.verdicts["a02"]["verdict_id"], "hold").status_code == 201
        # the audit log leaves out models outside the caller's scope
        models = {a["model"] for a in h.http.get("/v1/audit").json()["data"]}
        assert models == {"also-read"}
        assert h.http.get("/v1/audit", params={"model": "shelf-ranker"}).status_code == 403
    finally:
        h.app.dependency_overrides.clear()


def test_rollback_by_api_is_audited_with_cause(h: Harness) -> None:
    response = h.http.put(
        "/v1/models/shelf-ranker/baseline",
        json={"snapshot": "s01", "reason": "s02 and s03 mis-joined"},
        headers={"X-Actor": "carol"},
    )
    assert response.status_code == 200, response.text
    assert response.json() == {
        "model": "shelf-ranker",
        "baseline": "s01",
        "previous": "s03",
        "cause": "rollback",
    }
    entry = h.http.get("/v1/audit", params={"model": "shelf-ranker"}).json()["data"][0]
    assert (entry["actor"], entry["action"], entry["before"], entry["after"]) == (
        "carol",
        "baseline.rollback",
        {"baseline": "s03"},
        {"baseline": "s01"},
    )
    again = h.http.put(
        "/v1/models/shelf-ranker/baseline", json={"snapshot": "s01", "reason": "twice"}
    )
    assert again.status_code == 409


def test_gate_promotions_are_audited(h: Harness) -> None:
    entries = h.http.get("/v1/audit", params={"model": "shelf-ranker", "limit": 50}).json()["data"]
    promoted = [
        (e["target"], e["before"]["baseline"]) for e in entries if e["action"] == "baseline.verdict"
    ]
    assert promoted == [("s03", "s02"), ("s02", "s01"), ("s01", None)]
    assert all(e["actor"] == "gate" for e in entries)


def test_audit_pages_with_cursor(h: Harness) -> None:
    first = h.http.get("/v1/audit", params={"limit": 2}).json()
    assert first["count"] == 2 and first["next_cursor"]
    second = h.http.get("/v1/audit", params={"limit": 2, "cursor": first["next_cursor"]}).json()
    ids = [a["id"] for a in first["data"] + second["data"]]
    assert ids == sorted(ids, reverse=True) and len(set(ids)) == 4
    everything = h.http.get("/v1/audit", params={"limit": 500}).json()
    assert everything["next_cursor"] is None and everything["count"] == 5  # 5 gate promotions
    bad = h.http.get("/v1/audit", params={"cursor": "nonsense"})
    assert bad.status_code == 422 and bad.json()["error"]["field"] == "query.cursor"


def test_evidence_of_held_verdict(h: Harness) -> None:
    vid = h.verdicts["s04"]["verdict_id"]
    ev = h.http.get(f"/v1/verdicts/{vid}/evidence", params={"bins": 20}).json()
    dist = ev["distribution"]
    assert len(dist["edges"]) == 21
    assert dist["candidate"]["source"] == "sample" and dist["baseline"]["source"] == "sample"
    assert sum(dist["candidate"]["counts"]) == 400 and sum(dist["baseline"]["counts"]) == 400
    assert dist["candidate"]["mean"] > dist["baseline"]["mean"] + 0.25
    assert {(s["segment"], s["value"]) for s in ev["segments"]} == {
        ("device", "app"),
        ("device", "web"),
        ("reader_tenure", "new"),
        ("reader_tenure", "returning"),
    }
    assert sum(s["rows"] for s in ev["segments"] if s["segment"] == "device") == 400
    assert ev["baseline_snapshot"]["key"] == "s03" and ev["serving"] == "s03"
    assert h.http.get("/v1/verdicts/9999/evidence").status_code == 404
