"""The post flow through the HTTP API, on a temporary SQLite file per test."""

from __future__ import annotations

import json
import sqlite3
from typing import Any

import numpy as np
import pytest

from tests.conftest import Harness

POLICY = """
models = ["*"]
[sample]
min_rows = 200
[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
max = 0.1
[[checks]]
name = "auc"
kind = "metric"
metric = "auc"
direction = "higher"
max_drop = 0.01
"""


def body(
    key: str,
    *,
    seed: int = 0,
    shift: float = 0.0,
    auc: float = 0.8,
    minute: int = 0,
    n: int = 1000,
    **extra: Any,
) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    scores = np.clip(rng.beta(2, 5, n) + shift, 0, 1)
    out: dict[str, Any] = {
        "key": key,
        "trained_until": f"2026-12-01T{1 + minute // 60:02d}:{minute % 60:02d}:00Z",
        "metrics": {"auc": auc},
        "sample": {
            "score": scores.round(6).tolist(),
            "label": (rng.random(n) < scores).astype(int).tolist(),
            "segment.device": (["app", "web"] * n)[:n],
        },
    }
    out.update(extra)
    return out


def reject_constant(name: str) -> None:
    raise AssertionError(f"response is not strict JSON: {name}")


def count(h: Harness, table: str) -> int:
    with sqlite3.connect(h.db_path) as conn:
        return int(conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0])


@pytest.fixture
def h(make_harness) -> Harness:  # type: ignore[no-untyped-def]
    return make_harness({"p": POLICY})


def test_first_then_healthy_candidate_promotes(h: Harness) -> None:
    r = h.post("shelf-ranker", body("s1", seed=1))
    assert r.status_code == 201
    v = r.json()
    assert v["decision"] == "promote" and v["baseline"] is None and v["moved_baseline"]
    assert v["policy_digest"].startswith("sha256:")
    h.clock.advance(minutes=15)
    r = h.post("shelf-ranker", body("s2", seed=2, minute=15))
    v = r.json()
    assert v["decision"] == "promote" and v["baseline"] == "s1"
    models = h.client.get("/v1/models").json()
    assert models["data"][0]["baseline"] == "s2"
    assert models["data"][0]["last_verdict"]["snapshot"] == "s2"


def test_hold_on_drift_keeps_baseline(h: Harness) -> None:
    h.post("m", body("s1", seed=1))
    r = h.post("m", body("s2", seed=2, shift=0.25, minute=15))
    v = r.json()
    assert r.status_code == 201 and v["decision"] == "hold"
    assert v["reasons"][0].startswith("score PSI")
    psi = next(f for f in v["findings"] if f["check"] == "score-psi")
    assert psi["outcome"] == "breach" and psi["limit"] == 0.1 and psi["value"] > 0.1
    assert h.client.get("/v1/models/m").json()["baseline"] == "s1"


def test_hold_on_metric_drop(h: Harness) -> None:
    h.post("m", body("s1", seed=1, auc=0.80))
    v = h.post("m", body("s2", seed=1, auc=0.77, minute=15)).json()
    assert v["decision"] == "hold"
    assert v["reasons"] == ["auc 0.77 vs baseline 0.8: worse by 0.03, more than 0.01"]


def test_nonfinite_scores_are_stored_and_held(h: Harness) -> None:
    raw = (
        b'{"key": "nan1", "sample": {"score": [NaN, Infinity, null'
        + b"".join(b", 0.%d" % (i % 9 + 1) for i in range(300))
        + b"]}}"
    )
    r = h.client.post(
        "/v1/models/m/snapshots", content=raw, headers={"content-type": "application/json"}
    )
    assert r.status_code == 201
    v = r.json()
    assert v["decision"] == "hold"
    assert v["reasons"][0].startswith("3 of 303 scores are NaN, infinite or missing")
    json.loads(r.content, parse_constant=reject_constant)  # strict JSON: no NaN literals
    snap = h.client.get("/v1/models/m/snapshots/nan1").json()
    assert snap["sample_rows"] == 303 and snap["summary"]["finite"] == 300


@pytest.mark.parametrize(
    ("mutate", "status", "code", "field"),
    [
        (lambda b: b["sample"].update(label=[0, 1]), 422, "invalid_request", "sample.label"),
        (lambda b: b.update(surprise=1), 422, "invalid_request", "surprise"),
        (
            lambda b: b["sample"].update({"colour": ["x"] * 1000}),
            422,
            "invalid_request",
            "sample.colour",
        ),
        (lambda b: b["sample"].update(score="high"), 422, "invalid_request", "sample.score"),
        (lambda b: b.update(metrics={"auc": "good"}), 422, "invalid_request", "metrics.auc"),
        (lambda b: b.update(key=""), 422, "invalid_request", "key"),
        (lambda b: b.update(key="a/b"), 422, "invalid_request", "key"),
        (lambda b: b.update(rows_trained=-5), 422, "invalid_request", "rows_trained"),
        (
            lambda b: b["sample"].update(row_id=["r"] * 1000),
            422,
            "duplicate_row_id",
            "sample.row_id[1]",
        ),
        (lambda b: b["sample"].update(rank=[0] * 1000), 422, "invalid_request", "sample.rank[0]"),
    ],
)
def test_malformed_posts_are_rejected_and_store_nothing(
    h: Harness, mutate: Any, status: int, code: str, field: str
) -> None:
    b = body("bad", seed=3)
    mutate(b)
    r = h.post("m", b)
    assert r.status_code == status, r.text
    err = r.json()["error"]
    assert err["code"] == code and err["field"] == field and err["message"]
    for table in ("models", "snapshots", "sample_columns", "verdicts"):
        assert count(h, table) == 0


def test_nan_in_label_or_metric_is_422_not_500(h: Harness) -> None:
    for raw in (
        b'{"key": "k", "metrics": {"auc": NaN}}',
        b'{"key": "k", "sample": {"score": [0.1], "label": [NaN]}}',
        b'{"key": "k", "sample": {"score": [0.1]',
        b"[]",
    ):
        r = h.client.post(
            "/v1/models/m/snapshots", content=raw, headers={"content-type": "application/json"}
        )
        assert r.status_code == 422, raw
        assert r.json()["error"]["code"] in {"invalid_request", "invalid_json"}
    assert count(h, "snapshots") == 0


def test_bad_model_name_is_422(h: Harness) -> None:
    r = h.post("-bad name", body("k"))
    assert r.status_code == 422 and r.json()["error"]["field"] == "model"


def test_idempotent_retry_and_conflict(h: Harness) -> None:
    first = h.post("m", body("s1", seed=1))
    assert first.status_code == 201
    again = h.post("m", body("s1", seed=1))
    assert again.status_code == 200
    assert again.json()["verdict_id"] == first.json()["verdict_id"]
    assert count(h, "snapshots") == 1 and count(h, "verdicts") == 1
    clash = h.post("m", body("s1", seed=2))
    assert clash.status_code == 409 and clash.json()["error"]["code"] == "conflict"
    assert count(h, "snapshots") == 1


def test_stale_candidate_is_held(h: Harness) -> None:
    h.post("m", body("s1", seed=1, minute=30))
    v = h.post("m", body("s0", seed=2, minute=10)).json()
    assert v["decision"] == "hold" and v["reasons"][0].startswith("stale candidate")


def test_verdict_pagination_and_filters(h: Harness) -> None:
    for i in range(7):
        h.clock.advance(minutes=15)
        shift = 0.3 if i % 3 == 2 else 0.0
        h.post("m", body(f"s{i}", seed=i, shift=shift, minute=15 * (i + 1)))
    seen: list[str] = []
    cursor = None
    while True:
        params: dict[str, Any] = {"limit": 3}
        if cursor:
            params["cursor"] = cursor
        page = h.client.get("/v1/models/m/verdicts", params=params).json()
        seen += [v["snapshot"] for v in page["data"]]
        cursor = page["next_cursor"]
        if cursor is None:
            break
    assert seen == [f"s{i}" for i in reversed(range(7))]
    holds = h.client.get("/v1/models/m/verdicts", params={"decision": "hold"}).json()
    assert {v["snapshot"] for v in holds["data"]} == {"s2", "s5"}
    since = h.client.get("/v1/models/m/verdicts", params={"since": "2026-12-01T03:00:00Z"}).json()
    assert [v["snapshot"] for v in since["data"]] == ["s6", "s5", "s4", "s3"]
    bad = h.client.get("/v1/models/m/verdicts", params={"cursor": "garbage!"})
    assert bad.status_code == 422 and bad.json()["error"]["field"] == "query.cursor"


def test_one_verdict_and_snapshot(h: Harness) -> None:
    vid = h.post("m", body("s1", seed=1)).json()["verdict_id"]
    v = h.client.get(f"/v1/verdicts/{vid}").json()
    assert v["snapshot"] == "s1" and v["findings"]
    assert h.client.get("/v1/verdicts/999").status_code == 404
    snap = h.client.get("/v1/models/m/snapshots/s1").json()
    assert snap["columns"] == ["label", "score", "segment.device"]
    assert len(snap["summary"]["quantiles"]) == 101
    assert h.client.get("/v1/models/m/snapshots/zz").status_code == 404
    assert h.client.get("/v1/models/nope/snapshots/s1").json()["error"]["code"] == "not_found"


def test_set_baseline_by_hand_and_rollback(h: Harness) -> None:
    h.post("m", body("s1", seed=1))
    h.clock.advance(minutes=15)
    h.post("m", body("s2", seed=2, minute=15))
    r = h.client.put("/v1/models/m/baseline", json={"snapshot": "s1", "reason": "bad canary"})
    assert r.status_code == 200
    assert r.json() == {"model": "m", "baseline": "s1", "previous": "s2", "cause": "rollback"}
    assert h.client.get("/v1/models/m").json()["baseline"] == "s1"
    # two promotions by the gate (s1, s2), then the rollback by hand
    assert count(h, "audit_log") == 3
    actions = [a["action"] for a in h.client.get("/v1/audit").json()["data"]]
    assert actions == ["baseline.rollback", "baseline.verdict", "baseline.verdict"]
    r = h.client.put("/v1/models/m/baseline", json={"snapshot": "s1"})
    assert r.status_code == 422 and r.json()["error"]["field"] == "reason"
    r = h.client.put("/v1/models/m/baseline", json={"snapshot": "nope", "reason": "x"})
    assert r.status_code == 404


def test_policies_health_and_readiness(h: Harness) -> None:
    policies = h.client.get("/v1/policies").json()
    assert policies["count"] == 1 and policies["data"][0]["checks"][0]["name"] == "score-psi"
    assert h.client.get("/healthz").json()["status"] == "ok"
    assert h.client.get("/readyz").json()["status"] == "ok"
    assert h.client.get("/openapi.json").status_code == 200


def test_unknown_route_is_json_404(h: Harness) -> None:
    r = h.client.get("/v1/nothing")
    assert r.status_code == 404 and r.json()["error"]["code"] == "not_found"
