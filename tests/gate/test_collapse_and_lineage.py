"""Collapse relative to the baseline's spread; lineage against the newest watermark ever posted;
the lagged reference chosen by watermark. Pure gate, no store (issue 9, items 4-6)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from service.gate.checks.health import health_findings
from service.gate.checks.lineage import lineage_findings
from service.gate.policy import LineageRules, SampleRules
from service.gate.reference import Promotion, baseline_as_of_watermark, choose_reference
from service.gate.types import GateInput, Sample, SampleSummary, Snapshot

NOW = datetime(2026, 12, 1, 3, 0, tzinfo=UTC)
RULES = SampleRules(min_rows=100)


def snap(key: str, scores: np.ndarray | None = None, **kw: object) -> Snapshot:
    sample = None if scores is None else Sample({"score": np.asarray(scores, dtype=float)})
    return Snapshot(model="m", key=key, sample=sample, **kw)  # type: ignore[arg-type]


def collapse(candidate: Snapshot, baseline: Snapshot | None, rules: SampleRules = RULES):  # type: ignore[no-untyped-def]
    return next(
        f for f in health_findings(rules, candidate, baseline) if f.check.endswith("collapse")
    )


def beta_scores(seed: int, n: int = 5000) -> np.ndarray:
    return np.random.default_rng(seed).beta(2, 5, n)


def squeezed(scores: np.ndarray, std: float) -> np.ndarray:
    """*scores* around their mean, rescaled to standard deviation *std*."""
    return scores.mean() + (scores - scores.mean()) * (std / scores.std())


def test_std_of_1e_4_is_collapsed_against_the_baselines_spread() -> None:
    base = snap("b", beta_scores(1))
    cand = snap("c", squeezed(beta_scores(2), 1e-4))
    finding = collapse(cand, base)
    assert finding.outcome == "breach"
    # The reference value is numpy's population std of the baseline's scores.
    assert finding.baseline_value == pytest.approx(float(np.std(beta_scores(1))), rel=1e-12)
    assert finding.limit == pytest.approx(0.2 * float(np.std(beta_scores(1))), rel=1e-12)
    # Beta(2, 5) has std sqrt(ab / ((a+b)^2 (a+b+1))) = 0.1597 (the distribution's variance
    # formula); the sample's std is within 2 % of it at 5,000 rows.
    assert finding.baseline_value == pytest.approx(0.1597, rel=0.02)


def test_first_snapshot_uses_the_absolute_floor() -> None:
    # The old default floor 1e-6 let a std of 1e-4 through; the floor is now 1e-3.
    assert collapse(snap("c", squeezed(beta_scores(2), 1e-4)), None).outcome == "breach"
    assert collapse(snap("c", beta_scores(2)), None).outcome == "ok"


def test_relative_rule_knows_the_scale() -> None:
    # A model whose scores all lie near 1e-3 with std 2e-4: below the absolute floor, but normal
    # for this model, whose baseline has the same spread; half the spread is still not collapse.
    small = 1e-3 + (beta_scores(3) - 0.28) * 1e-3
    assert small.std() < 1e-3
    base = snap("b", small)
    assert collapse(snap("c", small * 0.5 + 5e-4), base).outcome == "ok"
    assert collapse(snap("c", squeezed(small, small.std() * 0.1)), base).outcome == "breach"
    # The boundary: at or below min_std_ratio of the baseline's std.
    rules = SampleRules(min_rows=100, min_std_ratio=0.5)
    assert collapse(snap("c", squeezed(small, small.std() * 0.49)), base, rules).outcome == "breach"
    assert collapse(snap("c", squeezed(small, small.std() * 0.51)), base, rules).outcome == "ok"


def test_baseline_spread_from_the_stored_summary_once_the_sample_is_pruned() -> None:
    summary = SampleSummary(count=5000, finite=5000, mean=0.3, std=0.15, minimum=0, maximum=1)
    pruned = snap("b", None, summary=summary)
    finding = collapse(snap("c", squeezed(beta_scores(2), 0.01)), pruned)
    assert finding.outcome == "breach" and finding.baseline_value == 0.15


def wm(minutes: float) -> datetime:
    return NOW + timedelta(minutes=minutes)


def lineage(candidate_mark: datetime, baseline_mark: datetime, newest: datetime | None) -> str:
    inp = GateInput(
        candidate=snap("c", trained_until=candidate_mark),
        baseline=snap("b", trained_until=baseline_mark),
        now=NOW,
        newest_watermark=newest,
    )
    (finding,) = lineage_findings(LineageRules(), inp)
    return finding.outcome


def test_watermark_must_pass_the_newest_ever_posted_not_only_the_baseline() -> None:
    # Baseline trained until 0 min; a held snapshot until +15 min; a replay until +10 min.
    assert lineage(wm(10), wm(0), newest=wm(15)) == "breach"
    assert lineage(wm(15), wm(0), newest=wm(15)) == "breach"  # equal is not an advance
    assert lineage(wm(20), wm(0), newest=wm(15)) == "ok"
    # Without the newest watermark (not loaded) the baseline's still applies.
    assert lineage(wm(10), wm(0), newest=None) == "ok"
    assert lineage(wm(-5), wm(0), newest=None) == "breach"
    # A baseline set by hand newer than anything posted before it still bars older candidates.
    assert lineage(wm(10), wm(30), newest=wm(15)) == "breach"


def test_reference_by_watermark_ignores_the_clock() -> None:
    # Ten promotions made seconds apart (a backfill), watermarks 15 minutes apart.
    promotions = [
        Promotion(f"s{i}", NOW + timedelta(seconds=i), trained_until=wm(15 * i)) for i in range(10)
    ]
    choice = choose_reference(
        pinned=None,
        lag_hours=1,
        promotions=promotions,
        now=NOW + timedelta(seconds=10),
        watermark=wm(150),
    )
    assert (choice.snapshot_key, choice.source) == ("s6", "lag")  # trained until 90 min
    # By the clock, one hour before "now" nothing was promoted yet: no reference at all.
    clock = choose_reference(
        pinned=None, lag_hours=1, promotions=promotions, now=NOW + timedelta(seconds=10)
    )
    assert clock.snapshot_key is None
    # A rolled-back snapshot is no anchor: the one before it is used.
    rolled = [
        p if p.snapshot_key != "s6" else Promotion("s6", p.at, p.trained_until, True)
        for p in promotions
    ]
    assert baseline_as_of_watermark(rolled, wm(90)) == "s5"
    assert baseline_as_of_watermark(promotions, wm(-1)) is None
