"""The plain-words explanation shared by ``tidegate why`` and the verdict page."""

from __future__ import annotations

from typing import Any

import pytest

from service import explain


def finding(**kw: Any) -> dict[str, Any]:
    base = {
        "check": "score-psi",
        "kind": "drift",
        "outcome": "breach",
        "statistic": "psi",
        "value": 0.31,
        "limit": 0.1,
        "pvalue": 1e-20,
        "baseline_value": 0.3,
        "candidate_value": 0.45,
        "interval": None,
        "blocking": True,
        "against": "baseline",
        "message": "score PSI 0.31 vs baseline exceeds 0.1, p < 1e-16",
        "details": {},
    }
    base.update(kw)
    return base


def verdict(**kw: Any) -> dict[str, Any]:
    base = {
        "verdict_id": 812,
        "model": "shelf-ranker",
        "snapshot": "2026-12-01T02:45Z",
        "decision": "hold",
        "effective_decision": "hold",
        "overridden": False,
        "reasons": ["score PSI 0.31 vs baseline exceeds 0.1, p < 1e-16"],
        "baseline": "2026-12-01T02:30Z",
        "policy": "shelf-ranker",
        "policy_digest": "sha256:x",
        "created_at": "2026-12-01T02:45:40Z",
        "error": None,
        "overrides": [],
        "findings": [
            finding(),
            finding(
                check="health.rows", kind="health", outcome="ok", message="sample has 3000 rows"
            ),
        ],
    }
    base.update(kw)
    return base


EVIDENCE = {
    "serving": "2026-12-01T02:30Z",
    "candidate_serving": False,
    "candidate": {
        "key": "2026-12-01T02:45Z",
        "score_mean": 0.45,
        "nonfinite": 0,
        "sample_rows": 3000,
        "metrics": {"auc": 0.762},
        "code_version": "9f2c1e0",
        "trained_until": "2026-12-01T02:44:00Z",
        "rows_trained": 1_840_000,
    },
    "baseline_snapshot": {
        "key": "2026-12-01T02:30Z",
        "score_mean": 0.30,
        "metrics": {"auc": 0.781},
        "code_version": "b7e41d2",
        "trained_until": "2026-12-01T02:29:00Z",
        "rows_trained": 1_600_000,
    },
    "distribution": {
        "edges": [0.0, 0.25, 0.5, 0.75, 1.0],
        "candidate": {"label": "candidate", "shares": [0.0, 0.2, 0.4, 0.4], "mean": 0.6},
        "baseline": {"label": "baseline", "shares": [0.1, 0.5, 0.3, 0.1], "mean": 0.4},
        "notes": [],
    },
    "segments": [
        {
            "segment": "device",
            "value": "app",
            "rows": 1800,
            "nonfinite": 0,
            "candidate_mean": 0.46,
            "baseline_mean": 0.31,
            "mean_change": 0.15,
        }
    ],
}


@pytest.mark.parametrize(
    "overrides, level",
    [
        ({}, "clear"),  # 3.1x its limit, p < 1e-16
        ({"value": 0.11, "pvalue": 1e-4}, "likely"),  # significant, barely over
        ({"pvalue": 0.2}, "marginal"),  # not significant
        ({"kind": "health", "pvalue": None}, "certain"),
        ({"kind": "lineage", "pvalue": None}, "certain"),
        ({"outcome": "inconclusive"}, "uncertain"),
        ({"statistic": "error"}, "certain"),
        ({"kind": "metric", "pvalue": None, "value": -0.03, "limit": -0.01}, "clear"),
        ({"kind": "metric", "pvalue": None, "value": -0.012, "limit": -0.01}, "marginal"),
        ({"kind": "metric", "pvalue": None, "limit": None}, "likely"),
        ({"kind": "lists", "pvalue": None, "value": 0.436, "limit": 0.05}, "clear"),
        ({"pvalue": None, "value": 0.004, "limit": 0.002, "interval": [0.003, 0.005]}, "clear"),
        ({"pvalue": None, "value": 0.004, "limit": 0.002, "interval": [0.001, 0.007]}, "marginal"),
    ],
)
def test_assess_levels(overrides: dict[str, Any], level: str) -> None:
    # thresholds: common practice, no source (see explain.CLEAR_P and friends)
    assert explain.assess(finding(**overrides))[0] == level


def test_assess_names_where_a_number_without_p_value_comes_from() -> None:
    metric = finding(kind="metric", pvalue=None, value=-0.03, limit=-0.01)
    assert explain.assess(metric)[1] == (
        "3.0× its limit; reported by the trainer without an interval"
    )
    lists = finding(kind="lists", pvalue=None, value=0.436, limit=0.05)
    assert explain.assess(lists)[1] == (
        "8.7× its limit; computed from the samples, with no p-value or interval"
    )


def test_assess_sentence_names_ratio_and_p() -> None:
    assert explain.assess(finding()) == ("clear", "3.1× its limit, p < 1e-16: far beyond chance")
    relative = finding(kind="metric", pvalue=None, limit=None, value=-0.0301, baseline_value=0.301)
    assert explain.assess(relative) == (
        "likely",
        "changed by -0.0301 (-10.0% of the baseline's "
        "value); reported by the trainer without an interval",
    )


def test_briefing_answers_four_questions_for_a_hold() -> None:
    answers = explain.briefing(verdict(), EVIDENCE)
    assert answers["why"] == ["score PSI 0.31 vs baseline exceeds 0.1, p < 1e-16"]
    assert answers["how_sure"] == ["score-psi: clear: 3.1× its limit, p < 1e-16: far beyond chance"]
    changed = answers["what_changed"]
    assert "mean score vs baseline 2026-12-01T02:30Z 0.3 → 0.45 (+0.15)" in changed
    assert "auc 0.781 → 0.762 (-0.019)" in changed
    assert "training code b7e41d2 → 9f2c1e0" in changed
    assert "trained until 2026-12-01 02:44 UTC: 15 min past the baseline's watermark" in changed
    assert "rows trained 1,600,000 → 1,840,000 (+15.0%)" in changed
    same = explain.briefing(
        verdict(), {**EVIDENCE, "candidate": {**EVIDENCE["candidate"], "score_mean": 0.30}}
    )
    assert "mean score vs baseline 2026-12-01T02:30Z 0.3, unchanged" in same["what_changed"]
    nxt = answers["what_next"]
    assert nxt[0] == "nothing to do to stay safe: the baseline 2026-12-01T02:30Z keeps serving"
    assert any("tidegate override 812 --decision promote" in line for line in nxt)


def test_briefing_after_override_and_for_promote() -> None:
    o = {
        "decision": "promote",
        "actor": "alice",
        "created_at": "2026-12-01T03:01:00Z",
        "reason": "planned relaunch",
    }
    answers = explain.briefing(
        verdict(overrides=[o], effective_decision="promote", overridden=True),
        {**EVIDENCE, "serving": "2026-12-01T02:45Z", "candidate_serving": True},
    )
    assert answers["why"][-1] == (
        "override to promote by alice at 2026-12-01 03:01 UTC: planned relaunch"
    )
    assert "override to hold" in answers["what_next"][0]
    promoted = explain.briefing(
        verdict(
            decision="promote",
            effective_decision="promote",
            reasons=[],
            findings=[finding(outcome="ok")],
        )
    )
    assert promoted["why"] == ["every blocking check passed"]
    assert promoted["how_sure"] == ["no blocking check failed"]


def test_headline_shows_override() -> None:
    o = {
        "decision": "promote",
        "actor": "alice",
        "created_at": "2026-12-01T03:01:00Z",
        "reason": "r",
    }
    assert explain.headline(verdict(overrides=[o])) == (
        "shelf-ranker 2026-12-01T02:45Z: HOLD (overridden to PROMOTE by alice at "
        "2026-12-01 03:01 UTC)"
    )
    assert explain.headline(verdict()) == "shelf-ranker 2026-12-01T02:45Z: HOLD"


def test_sparkline_heights_are_proportional() -> None:
    assert explain.sparkline([0.0, 1.0, 2.0, 4.0, 8.0]) == " ▁▂▄█"
    assert explain.sparkline([0.5, 1.0], top=2.0) == "▂▄"
    assert explain.sparkline([0.001], top=1.0) == "▁"  # any positive value is visible
    assert explain.sparkline([1.0, 0.5], ascii_only=True) == "@="


def test_explain_text_carries_both_distributions_on_one_scale() -> None:
    text = explain.explain(verdict(), EVIDENCE)
    lines = text.splitlines()
    cand = next(line for line in lines if line.strip().startswith("candidate |"))
    base = next(line for line in lines if line.strip().startswith("baseline  |"))
    # shares [0, .2, .4, .4] and [.1, .5, .3, .1] on one scale (top 0.5)
    assert cand.split("|")[1] == " ▄▇▇" and base.split("|")[1] == "▂█▅▂"
    for title in ("why:", "how sure:", "what changed:", "what you can do:", "findings:"):
        assert title in lines
    assert "  device=app: 1,800 rows; 0.46 vs 0.31 (+0.15)" in lines
    assert explain.explain(verdict(), EVIDENCE, ascii_only=True).isascii()
    assert "|" + explain.sparkline([0.0, 0.2, 0.4, 0.4], 0.5, ascii_only=True) + "|" in (
        explain.explain(verdict(), EVIDENCE, ascii_only=True)
    )


def test_explain_without_evidence_still_works() -> None:
    text = explain.explain(verdict())
    assert text.startswith("shelf-ranker 2026-12-01T02:45Z: HOLD\n")
    assert "mean score 0.3 → 0.45" in text
