"""Quality checks through the HTTP API: a paired post, an unpaired one, the stored verdict."""

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
name = "auc-vs-baseline"
kind = "quality"
metric = "auc"
rule = "non-inferiority"
margin = 0.01
confidence = 0.95
segments = ["device"]
min_segment_rows = 200
[[checks]]
name = "churn"
kind = "paired"
statistic = "churn"
threshold = 0.5
max = 0.2
[[checks]]
name = "score-js"
kind = "drift"
statistic = "js"
max = 0.2
"""


def shelf(
    key: str, seed: int, *, noise: float, minute: int, n: int = 4000, paired: bool = True
) -> dict[str, Any]:
    """Invented home-shelf clicks; the serving baseline scored the same rows."""
    rng = np.random.default_rng(seed)
    appeal = rng.normal(size=n)
    label = (rng.random(n) < 1 / (1 + np.exp(-(appeal - 1.0)))).astype(int)
    shared = 0.8 * rng.normal(size=n)
    score = 1 / (1 + np.exp(-(appeal - 1.0 + shared + noise * rng.normal(size=n))))
    base = 1 / (1 + np.exp(-(appeal - 1.0 + shared + 0.3 * rng.normal(size=n))))
    sample: dict[str, Any] = {
        "score": score.round(6).tolist(),
        "label": label.tolist(),
        "segment.device": np.where(rng.random(n) < 0.5, "app", "web").tolist(),
    }
    if paired:
        sample["baseline_score"] = base.round(6).tolist()
    return {
        "key": key,
        "trained_until": f"2026-12-01T{1 + minute // 60:02d}:{minute % 60:02d}:00Z",
        "sample": sample,
    }


def reject_constant(name: str) -> None:
    raise AssertionError(f"response is not strict JSON: {name}")


@pytest.fixture
def h(make_harness) -> Harness:  # type: ignore[no-untyped-def]
    return make_harness({"p": POLICY})


def test_paired_regression_is_held_with_evidence_and_stored(h: Harness) -> None:
    assert (
        h.post("shelf-ranker", shelf("s1", 1, noise=0.3, minute=0)).json()["decision"] == "promote"
    )
    h.clock.advance(minutes=15)
    r = h.post("shelf-ranker", shelf("s2", 2, noise=1.5, minute=15))
    assert r.status_code == 201, r.text
    v = r.json()
    assert v["decision"] == "hold"
    auc = next(f for f in v["findings"] if f["check"] == "auc-vs-baseline")
    assert auc["outcome"] == "breach" and auc["details"]["mode"] == "paired"
    assert [row["segment"] for row in auc["details"]["segments"]] == [
        "(all)",
        "device=app",
        "device=web",
    ]
    assert auc["interval"][1] < -0.01 and auc["details"]["mde"] > 0
    # The stored verdict gives back the same evidence, as strict JSON.
    stored = h.client.get(f"/v1/verdicts/{v['verdict_id']}")
    json.loads(stored.text, parse_constant=reject_constant)
    again = next(f for f in stored.json()["findings"] if f["check"] == "auc-vs-baseline")
    assert again["details"]["segments"] == auc["details"]["segments"]


def test_unpaired_uses_the_stored_baseline_sample(h: Harness) -> None:
    h.post("also-read", shelf("a1", 3, noise=0.3, minute=0, paired=False))
    h.clock.advance(hours=1)
    v = h.post("also-read", shelf("a2", 4, noise=0.3, minute=60, paired=False)).json()
    auc = next(f for f in v["findings"] if f["check"] == "auc-vs-baseline")
    assert auc["details"]["mode"] == "unpaired" and auc["details"]["method"] == "delong-unpaired"
    churn = next(f for f in v["findings"] if f["check"] == "churn")
    assert churn["outcome"] == "skipped"
