"""Off-policy estimates through the HTTP API: a logged-exploration sample is judged, stored and
read back; malformed log columns are 422 naming column and row and store nothing; a log with
impossible values is stored and held with ``health.log``."""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pytest

from tests.conftest import Harness

POLICY = """
models = ["*"]
on_inconclusive = "hold"
[sample]
min_rows = 200
[[checks]]
name = "shelf-reward"
kind = "off-policy"
estimator = "dr"
rule = "non-inferiority"
margin = 0.02
confidence = 0.95
min_ess = 300
segments = ["device"]
min_segment_rows = 1000
"""
K = 50


def _softmax(x: np.ndarray) -> np.ndarray:
    e = np.exp(x - x.max(axis=1, keepdims=True))
    out: np.ndarray = e / e.sum(axis=1, keepdims=True)
    return out


def exploration(key: str, seed: int, *, worse: bool, minute: int, n: int = 4000) -> dict[str, Any]:
    """Invented home-shelf exploration slots: one of K books uniformly at random per slot."""
    rng = np.random.default_rng(seed)
    appeal = rng.normal(-2.0, 1.0, (n, K))
    click = 1 / (1 + np.exp(-appeal))
    shared = rng.normal(0, 1.0, (n, K))
    base = _softmax(appeal + shared)
    cand = _softmax((-0.6 if worse else 1.0) * appeal + shared + rng.normal(0, 0.2, (n, K)))
    action = rng.integers(0, K, n)
    rows = np.arange(n)
    r_hat = np.clip(click + rng.normal(0, 0.02, (n, K)), 0, 1)
    sample = {
        "score": rng.random(n).round(6).tolist(),
        "segment.device": np.where(rng.random(n) < 0.5, "app", "web").tolist(),
        "reward": (rng.random(n) < click[rows, action]).astype(int).tolist(),
        "logging_propensity": [1.0 / K] * n,
        "candidate_propensity": cand[rows, action].round(8).tolist(),
        "baseline_propensity": base[rows, action].round(8).tolist(),
        "reward_prediction": r_hat[rows, action].round(6).tolist(),
        "candidate_expected_reward": (cand * r_hat).sum(axis=1).round(6).tolist(),
        "baseline_expected_reward": (base * r_hat).sum(axis=1).round(6).tolist(),
    }
    return {
        "key": key,
        "trained_until": f"2026-12-01T{1 + minute // 60:02d}:{minute % 60:02d}:00Z",
        "sample": sample,
    }


@pytest.fixture
def h(make_harness) -> Harness:  # type: ignore[no-untyped-def]
    return make_harness({"p": POLICY})


def _finding(verdict: dict[str, Any], check: str) -> dict[str, Any]:
    return next(f for f in verdict["findings"] if f["check"] == check)


def test_logged_exploration_sample_is_judged_via_http(h: Harness) -> None:
    first = h.post("shelf-ranker", exploration("s1", 1, worse=False, minute=0))
    assert first.status_code == 201, first.text
    ok = _finding(first.json(), "shelf-reward")
    assert ok["outcome"] == "ok", ok["message"]
    assert first.json()["decision"] == "promote"
    h.clock.advance(minutes=15)
    r = h.post("shelf-ranker", exploration("s2", 2, worse=True, minute=15))
    assert r.status_code == 201, r.text
    v = r.json()
    assert v["decision"] == "hold"
    f = _finding(v, "shelf-reward")
    assert f["outcome"] == "breach" and f["kind"] == "off-policy"
    assert f["statistic"] == "dr reward change"
    assert f["interval"][1] < -0.02
    assert f["details"]["candidate"]["ess"] > 300
    assert [row["segment"] for row in f["details"]["segments"]] == [
        "(all)",
        "device=app",
        "device=web",
    ]
    # the stored verdict gives the same evidence back, as strict JSON
    stored = h.client.get(f"/v1/verdicts/{v['verdict_id']}")

    def reject(name: str) -> None:
        raise AssertionError(f"not strict JSON: {name}")

    json.loads(stored.text, parse_constant=reject)
    assert _finding(stored.json(), "shelf-reward")["details"] == f["details"]
    # the log columns are stored with the snapshot
    snap = h.client.get("/v1/models/shelf-ranker/snapshots/s2").json()
    assert {"reward", "logging_propensity", "candidate_expected_reward"} <= set(snap["columns"])


@pytest.mark.parametrize(
    ("column", "value", "field"),
    [
        ("logging_propensity", "0.02", "sample.logging_propensity[3]"),
        ("reward", True, "sample.reward[3]"),
        ("candidate_propensity", [0.1], "sample.candidate_propensity[3]"),
    ],
)
def test_malformed_log_column_is_422_naming_column_and_row(
    h: Harness, column: str, value: Any, field: str
) -> None:
    body = exploration("bad", 3, worse=False, minute=0, n=400)
    body["sample"][column][3] = value
    r = h.post("shelf-ranker", body)
    assert r.status_code == 422, r.text
    assert r.json()["error"]["field"] == field
    assert h.client.get("/v1/models/shelf-ranker/snapshots/bad").status_code == 404


@pytest.mark.parametrize(
    ("drop", "field"),
    [
        ("baseline_propensity", "sample.baseline_propensity"),
        ("reward", "sample.reward"),
    ],
)
def test_incomplete_log_columns_are_422(h: Harness, drop: str, field: str) -> None:
    body = exploration("bad", 4, worse=False, minute=0, n=400)
    del body["sample"][drop]
    r = h.post("shelf-ranker", body)
    assert r.status_code == 422, r.text
    err = r.json()["error"]
    assert err["field"] == field and err["code"] == "missing_column"
    assert h.client.get("/v1/models/shelf-ranker/snapshots/bad").status_code == 404


def test_reward_model_columns_need_each_other(h: Harness) -> None:
    body = exploration("bad", 5, worse=False, minute=0, n=400)
    del body["sample"]["baseline_expected_reward"]
    r = h.post("shelf-ranker", body)
    assert r.status_code == 422
    assert r.json()["error"]["field"] == "sample.baseline_expected_reward"


def test_impossible_propensity_is_stored_and_held(h: Harness) -> None:
    body = exploration("odd", 6, worse=False, minute=0, n=2000)
    body["sample"]["logging_propensity"][41] = 1.7
    r = h.post("shelf-ranker", body)
    assert r.status_code == 201, r.text
    v = r.json()
    assert v["decision"] == "hold"
    health = _finding(v, "health.log")
    assert health["outcome"] == "breach"
    assert "sample.logging_propensity[41]" in health["message"]
    assert health["details"]["problems"][0]["field"] == "sample.logging_propensity[41]"
    assert h.client.get("/v1/models/shelf-ranker/snapshots/odd").status_code == 200
