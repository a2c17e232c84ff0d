"""Evidence: distributions on common bins (from samples or quantile summaries) and segments."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from service import evidence
from service.gate.types import Sample
from service.store import codec


def test_counts_from_values_hand_count() -> None:
    edges = np.array([0.0, 0.25, 0.5, 0.75, 1.0])
    values = np.array([0.1, 0.2, 0.3, 0.9, 1.0, np.nan, np.inf])
    # by hand: [0, .25): 0.1, 0.2; [.25, .5): 0.3; [.5, .75): none; [.75, 1]: 0.9, 1.0
    assert evidence.counts_from_values(values, edges).tolist() == [2, 1, 0, 2]


def test_counts_from_uniform_quantiles_match_scipy_cdf() -> None:
    # quantiles of U(0, 1) at levels 0, 0.01, ..., 1 are the levels themselves
    quantiles = stats.uniform.ppf(np.linspace(0, 1, 101))
    edges = np.linspace(0.0, 1.0, 11)
    counts = evidence.counts_from_quantiles(quantiles, 1000, edges)
    expected = np.diff(stats.uniform.cdf(edges)) * 1000  # scipy.stats reference: 100 per bin
    assert counts == pytest.approx(expected, abs=1e-9)


def test_counts_from_normal_quantiles_match_scipy_cdf_within_a_percentile() -> None:
    levels = np.linspace(0.0, 1.0, 101)
    quantiles = stats.norm.ppf(np.clip(levels, 0.0005, 0.9995))  # finite ends
    edges = np.linspace(-2.0, 2.0, 9)
    counts = evidence.counts_from_quantiles(quantiles, 10_000, edges)
    expected = np.diff(stats.norm.cdf(edges)) * 10_000
    # linear interpolation between percentiles: each bin within one percentile (100 rows)
    assert np.abs(counts - expected).max() < 100


def test_summary_of_a_sample_rebins_close_to_the_sample() -> None:
    rng = np.random.default_rng(20261201)
    scores = rng.beta(2.0, 5.0, 5000)
    summary = codec.summarise(scores).to_dict()
    from_sample = evidence.distribution(evidence.SideInput("c", values=scores), None, bins=20)
    from_summary = evidence.distribution(evidence.SideInput("c", summary=summary), None, bins=20)
    assert from_sample.edges == pytest.approx(from_summary.edges)
    assert from_summary.candidate is not None and from_sample.candidate is not None
    assert from_summary.candidate.source == "summary"
    diff = np.subtract(from_summary.candidate.shares(), from_sample.candidate.shares())
    assert np.abs(diff).max() < 0.012  # within about one percentile per bin
    assert any("quantile summary" in n for n in from_summary.notes)


def test_collapsed_output_puts_all_mass_in_one_bin() -> None:
    scores = np.full(300, 0.31)
    dist = evidence.distribution(
        evidence.SideInput("c", values=scores),
        evidence.SideInput("b", summary=codec.summarise(scores).to_dict()),
        bins=10,
    )
    assert dist.candidate is not None and dist.baseline is not None
    assert max(dist.candidate.shares()) == 1.0
    assert max(dist.baseline.shares()) == pytest.approx(1.0)
    assert dist.edges[0] < 0.31 < dist.edges[-1]


def test_common_edges_span_both_sides() -> None:
    cand = evidence.SideInput("c", values=np.array([0.5, 0.9, np.nan]))
    base = evidence.SideInput("b", values=np.array([0.1, 0.4]))
    dist = evidence.distribution(cand, base, bins=8)
    assert (dist.edges[0], dist.edges[-1]) == (0.1, 0.9)
    assert dist.candidate is not None and dist.candidate.rows == 3 and dist.candidate.finite == 2
    assert sum(dist.candidate.counts) == 2 and sum(dist.baseline.counts) == 2  # type: ignore[union-attr]


def test_side_without_finite_scores_is_left_out_with_a_note() -> None:
    dist = evidence.distribution(
        evidence.SideInput("c", values=np.array([np.nan, np.nan])),
        evidence.SideInput("b", values=np.array([0.2, 0.3])),
    )
    assert dist.candidate is None and dist.baseline is not None
    assert dist.notes == ("the candidate has no finite scores to draw",)


def test_segment_table_matches_pandas_groupby() -> None:
    rng = np.random.default_rng(7)
    n = 500
    device = np.where(rng.random(n) < 0.6, "app", "web").astype(object)
    score = rng.random(n)
    score[:5] = np.nan
    paired = rng.random(n)
    label = (rng.random(n) < 0.3).astype(float)
    sample = Sample(
        {"score": score, "baseline_score": paired, "label": label, "segment.device": device}
    )
    rows = {r["value"]: r for r in evidence.segment_table(sample)}
    frame = pd.DataFrame({"device": device, "score": score, "paired": paired, "label": label})
    grouped = frame.groupby("device")  # pandas reference; mean() skips NaN
    for value, group in grouped:
        row = rows[value]
        assert row["rows"] == len(group)
        assert row["candidate_mean"] == pytest.approx(group["score"].mean())
        assert row["baseline_mean"] == pytest.approx(group["paired"].mean())
        assert row["label_rate"] == pytest.approx(group["label"].mean())
        assert row["nonfinite"] == int(group["score"].isna().sum())
        assert row["baseline_source"] == "same rows"
    assert rows["app"]["rows"] > rows["web"]["rows"]  # largest segment value first
    assert list(rows) == ["app", "web"]


def test_segment_table_uses_baseline_sample_when_not_paired() -> None:
    cand = Sample(
        {
            "score": np.array([0.2, 0.4, 0.6]),
            "segment.device": np.array(["app", "app", "web"], dtype=object),
        }
    )
    base = Sample(
        {
            "score": np.array([0.1, 0.3, 0.5, 0.9]),
            "segment.device": np.array(["app", "web", "web", "web"], dtype=object),
        }
    )
    rows = {r["value"]: r for r in evidence.segment_table(cand, base)}
    assert rows["app"]["baseline_mean"] == pytest.approx(0.1)
    assert rows["web"]["baseline_mean"] == pytest.approx((0.3 + 0.5 + 0.9) / 3)
    assert rows["web"]["mean_change"] == pytest.approx(0.6 - (0.3 + 0.5 + 0.9) / 3)
    assert rows["app"]["baseline_source"] == "baseline sample"


def test_finding_segment_rows_are_collected_and_tagged() -> None:
    findings = [
        {
            "check": "seg-auc",
            "details": {"segments": [{"segment": "device=app", "auc": 0.7}, "not a row"]},
        },
        {"check": "score-psi", "details": {"edges": [0.1]}},
        {"check": "odd", "details": {"segments": "nope"}},
    ]
    assert evidence.finding_segment_rows(findings) == [
        {"check": "seg-auc", "segment": "device=app", "auc": 0.7}
    ]
