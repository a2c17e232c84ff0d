"""Shared sort work (issue 10 item 6): the checks of one evaluation share each column's sort
order, sorted values and codes (service/gate/checks/memo.py). The statistics must be exactly
the ones computed without sharing, and still match the outside references."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import numpy as np
import pytest
from scipy import stats as sps
from sklearn.metrics import roc_auc_score

from service.gate.checks import memo
from service.gate.evaluate import evaluate
from service.gate.policy import parse_policy
from service.gate.types import GateInput, Sample, Snapshot
from service.stats import distance
from service.stats import drift as drift_stats
from service.stats.sorting import MIN_ROWS

CHECKS = """
models = ["*"]
[sample]
min_rows = 100

[[checks]]
name = "auc"
kind = "quality"
metric = "auc"
rule = "non-inferiority"
margin = 0.01
segments = ["reader_tenure", "device"]
min_segment_rows = 100
correction = "holm"

[[checks]]
name = "logloss"
kind = "quality"
metric = "logloss"
rule = "non-inferiority"
margin = 0.01

[[checks]]
name = "spearman"
kind = "paired"
statistic = "spearman"
min = 0.5
"""
STATISTICS = ("psi", "ks", "ad", "js", "wasserstein", "quantile_shift", "mean_shift")
POLICY = parse_policy(
    CHECKS
    + "".join(
        f'\n[[checks]]\nname = "{s}"\nkind = "drift"\nstatistic = "{s}"\nmax = 10.0\n'
        for s in STATISTICS
    ),
    name="shared",
)
NOW = datetime(2026, 12, 2, tzinfo=UTC)


def shelf(n: int, seed: int) -> tuple[Snapshot, Snapshot]:
    """Invented home-shelf clicks of the demo bookshop: a paired candidate, and the baseline's
    own sample (seeded)."""
    rng = np.random.default_rng(seed)
    appeal = rng.normal(size=n)
    label = (rng.random(n) < 1 / (1 + np.exp(-(appeal - 1.0)))).astype(np.float64)
    cand = np.round(1 / (1 + np.exp(-(appeal + 0.8 * rng.normal(size=n)))), 4)  # with ties
    base = 1 / (1 + np.exp(-(appeal + 0.8 * rng.normal(size=n))))
    tenure = np.array(np.where(rng.random(n) < 0.3, "new", "returning").tolist(), dtype=object)
    device = np.array(np.where(rng.random(n) < 0.6, "app", "web").tolist(), dtype=object)
    candidate = Snapshot(
        model="shelf-ranker",
        key="c",
        sample=Sample(
            {
                "score": cand,
                "label": label,
                "baseline_score": base,
                "segment.reader_tenure": tenure,
                "segment.device": device,
            }
        ),
    )
    other = rng.permutation(n)
    baseline = Snapshot(
        model="shelf-ranker",
        key="b",
        sample=Sample({"score": base[other] + 0.01, "label": label[other]}),
    )
    return candidate, baseline


def findings(candidate: Snapshot, baseline: Snapshot) -> list[dict[str, Any]]:
    verdict = evaluate(GateInput(candidate=candidate, baseline=baseline, now=NOW), POLICY)
    assert not [f.message for f in verdict.findings if f.statistic == "error"]
    return [f.to_dict() for f in verdict.findings]


def test_shared_sorts_give_the_statistics_of_separate_sorts(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    candidate, baseline = shelf(4 * MIN_ROWS, seed=11)  # above MIN_ROWS: the key sort runs
    shared = findings(candidate, baseline)
    # The uncached path: nothing remembered, numpy's argsort and sort every time.
    monkeypatch.setattr(memo, "remembered", lambda array, what, compute: compute())
    monkeypatch.setattr(memo, "order_and_sorted", lambda v: (np.argsort(v), np.sort(v)))
    separate = findings(candidate, baseline)
    assert shared == separate  # every number, exactly

    by_check = {f["check"]: f for f in shared}
    assert candidate.sample is not None and baseline.sample is not None
    score, label = candidate.sample.score, candidate.sample.columns["label"]
    other = baseline.sample.score
    # References: scikit-learn's AUC; scipy's KS, Anderson-Darling (midrank) and Wasserstein-1.
    assert by_check["auc"]["candidate_value"] == pytest.approx(
        roc_auc_score(label, score), abs=1e-12
    )
    assert by_check["ks"]["value"] == pytest.approx(sps.ks_2samp(other, score).statistic, abs=1e-12)
    assert by_check["ad"]["value"] == pytest.approx(
        sps.anderson_ksamp([other, score], variant="midrank").statistic, rel=1e-9
    )
    assert by_check["wasserstein"]["value"] == pytest.approx(
        sps.wasserstein_distance(other, score) / np.std(other, ddof=1), rel=1e-12
    )
    assert by_check["spearman"]["value"] == pytest.approx(
        sps.spearmanr(score, candidate.sample.columns["baseline_score"]).statistic, abs=1e-12
    )


def test_presorted_statistics_equal_their_own_sorts() -> None:
    rng = np.random.default_rng(5)
    base, cand = np.round(rng.normal(size=5000), 2), np.round(rng.normal(0.1, 1, 4000), 2)
    sb, sc = np.sort(base), np.sort(cand)
    assert drift_stats.psi(sb, sc, presorted=True) == drift_stats.psi(base, cand)
    assert drift_stats.ks_2samp(sb, sc, presorted=True) == drift_stats.ks_2samp(base, cand)
    assert distance.anderson_ksamp(sb, sc, presorted=True) == distance.anderson_ksamp(base, cand)
    assert distance.wasserstein(sb, sc, presorted=True) == distance.wasserstein(base, cand)
    assert distance.jensen_shannon(sb, sc, presorted=True) == distance.jensen_shannon(base, cand)


def test_the_score_is_sorted_once_per_evaluation(monkeypatch: pytest.MonkeyPatch) -> None:
    candidate, baseline = shelf(2 * MIN_ROWS, seed=3)
    sorts: list[int] = []
    real = memo.order_and_sorted

    def counted(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        sorts.append(values.size)
        return real(values)

    monkeypatch.setattr(memo, "order_and_sorted", counted)
    findings(candidate, baseline)
    # One sort with its order for each of the two score columns of the paired sample (the
    # health check, AUC, Spearman and every drift statistic share them).
    assert len(sorts) == 2
