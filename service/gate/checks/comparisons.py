"""Quality metrics from labels and their change, candidate against baseline.

Which test each metric gets (see README, "quality" check):

| metric | paired (``baseline_score`` on the same rows) | unpaired (baseline's own sample) |
|---|---|---|
| auc | DeLong, correlated curves (Sun & Xu's algorithm) | DeLong, independent curves |
| logloss, brier | paired t on per-row differences | Welch t on per-row terms |
| ndcg, recall, mrr, hit_rate | paired t on per-group differences | Welch t on per-group values |
| calibration_ratio, ece | paired bootstrap (rows) | bootstrap of each sample |

``method = "bootstrap"`` in a policy uses the bootstrap for every metric (groups are resampled
whole for the ranking metrics). ``calibration_ratio`` is compared by its distance from 1:
the change is ``|R_c - 1| - |R_b - 1|`` (lower is better).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import numpy as np

from service.stats import bootstrap as boot
from service.stats import quality as q
from service.stats.auc import delong_paired, delong_unpaired, placements
from service.stats.inference import (
    ChangeTest,
    bootstrap_change,
    normal_change,
    paired_mean_change,
    welch_mean_change,
)
from service.stats.ranking import RANKING_METRICS, GroupedLabels, PerGroup

QualityMetric = Literal[
    "auc", "logloss", "brier", "calibration_ratio", "ece", "ndcg", "recall", "mrr", "hit_rate"
]
#: +1: higher is better; -1: lower is better.
DIRECTION: dict[str, float] = {
    "auc": 1.0,
    "ndcg": 1.0,
    "recall": 1.0,
    "mrr": 1.0,
    "hit_rate": 1.0,
    "logloss": -1.0,
    "brier": -1.0,
    "ece": -1.0,
    "calibration_ratio": -1.0,
}
LABELS = {
    "auc": "AUC",
    "logloss": "log loss",
    "brier": "Brier score",
    "calibration_ratio": "calibration ratio",
    "ece": "ECE",
    "ndcg": "NDCG",
    "recall": "recall",
    "mrr": "MRR",
    "hit_rate": "hit rate",
}


@dataclass(frozen=True)
class Options:
    """The policy keys the computations need."""

    metric: str
    k: int
    gain: Literal["linear", "exponential"]
    bins: int
    confidence: float
    method: Literal["auto", "bootstrap"]
    resamples: int


@dataclass(frozen=True)
class Side:
    """One sample's rows for one unit: labels, score, and group codes for ranking metrics."""

    label: np.ndarray
    score: np.ndarray
    groups: np.ndarray | None = None
    n_groups: int = 0
    #: ``argsort(score)`` when known (saves a sort per segment).
    order: np.ndarray | None = None
    #: Whether the score has ties, when known (False: none on all rows, so none in a subset).
    ties: bool | None = None


@dataclass(frozen=True)
class Comparison:
    candidate_value: float
    baseline_value: float
    test: ChangeTest
    #: "rows" or "groups": what n counts.
    units: str


def is_ranking(metric: str) -> bool:
    return metric in RANKING_METRICS


def label_of(metric: str, k: int) -> str:
    return f"{LABELS[metric]}@{k}" if is_ranking(metric) else LABELS[metric]


# ---- one sample's value ------------------------------------------------------------------


def _per_group(side: Side, opts: Options) -> PerGroup:
    assert side.groups is not None
    grouped = GroupedLabels.of(side.groups, side.n_groups, side.label)
    return grouped.per_group(opts.metric, side.score, k=opts.k, gain=opts.gain)  # type: ignore[arg-type]


def value_of(side: Side, opts: Options) -> float:
    """The metric of one sample (for floors and ceilings)."""
    metric = opts.metric
    if metric == "auc":
        return placements(side.label > 0, side.score, order=side.order).auc
    if metric == "logloss":
        return q.log_loss(side.label, side.score)
    if metric == "brier":
        return q.brier(side.label, side.score)
    if metric == "calibration_ratio":
        return q.calibration_ratio(side.label, side.score)
    if metric == "ece":
        return q.expected_calibration_error(side.label, side.score, bins=opts.bins)
    return _per_group(side, opts).mean


# ---- weighted statistics for the bootstrap -------------------------------------------------


def _row_statistic(side: Side, opts: Options) -> Callable[[np.ndarray], np.ndarray]:
    """``weights (b, n) -> metric (b,)`` for a row-level metric of one sample."""
    metric = opts.metric
    y = q.outcomes(side.label)
    if metric == "auc":
        return boot.weighted_auc(y > 0, side.score)
    if metric == "logloss":
        return boot.weighted_mean(q.log_loss_terms(y, side.score))
    if metric == "brier":
        return boot.weighted_mean(q.brier_terms(y, side.score))
    p = q.probabilities(side.score)
    if metric == "calibration_ratio":
        ratio = boot.weighted_ratio(p, y)
        return lambda w: np.abs(ratio(w) - 1.0)
    if metric == "ece":
        cut = q.equal_mass_bins(p, opts.bins)
        return boot.weighted_binned_abs_sum(p - y, cut.index, cut.size.size)
    raise ValueError(f"no row statistic for {metric!r}")


def _point(side: Side, opts: Options) -> float:
    """The compared quantity (calibration ratio: its distance from 1)."""
    value = value_of(side, opts)
    return abs(value - 1.0) if opts.metric == "calibration_ratio" else value


def _needs_bootstrap(opts: Options) -> bool:
    return opts.method == "bootstrap" or opts.metric in ("calibration_ratio", "ece")


# ---- paired ------------------------------------------------------------------------------


def compare_paired(
    candidate: Side, baseline: Side, opts: Options, rng: np.random.Generator
) -> Comparison:
    """Candidate against baseline on the same rows (``baseline.label`` is ``candidate.label``)."""
    metric = opts.metric
    if is_ranking(metric):
        assert candidate.groups is not None
        grouped = GroupedLabels.of(candidate.groups, candidate.n_groups, candidate.label)
        pc = grouped.per_group(metric, candidate.score, k=opts.k, gain=opts.gain)  # type: ignore[arg-type]
        pb = grouped.per_group(metric, baseline.score, k=opts.k, gain=opts.gain)  # type: ignore[arg-type]
        diff = pc.values - pb.values  # same groups kept: relevance comes from the shared labels
        estimate = float(diff.mean()) if diff.size else 0.0
        if opts.method == "bootstrap":
            reps = boot.paired_replicates(
                boot.weighted_mean(diff), diff.size, resamples=opts.resamples, rng=rng
            )
            test = bootstrap_change(
                estimate,
                reps,
                confidence=opts.confidence,
                method="bootstrap-paired-groups",
                n_candidate=diff.size,
                n_baseline=diff.size,
            )
        else:
            test = paired_mean_change(diff, confidence=opts.confidence)
        return Comparison(pc.mean, pb.mean, test, "groups")
    n = candidate.score.size
    if metric == "auc" and not _needs_bootstrap(opts):
        result = delong_paired(
            None,
            candidate.score,
            baseline.score,
            positive=candidate.label > 0,
            orders=None
            if candidate.order is None or baseline.order is None
            else (candidate.order, baseline.order),
            ties=None
            if candidate.ties is None or baseline.ties is None
            else (candidate.ties, baseline.ties),
        )
        test = normal_change(
            result.difference,
            result.se,
            confidence=opts.confidence,
            method=result.method,
            n_candidate=n,
            n_baseline=n,
        )
        return Comparison(result.candidate, result.baseline, test, "rows")
    if metric in ("logloss", "brier") and not _needs_bootstrap(opts):
        terms = q.log_loss_terms if metric == "logloss" else q.brier_terms
        tc = terms(candidate.label, candidate.score)
        tb = terms(baseline.label, baseline.score)
        test = paired_mean_change(tc - tb, confidence=opts.confidence)
        return Comparison(float(tc.mean()), float(tb.mean()), test, "rows")
    stat = boot.difference(_row_statistic(candidate, opts), _row_statistic(baseline, opts))
    estimate = _point(candidate, opts) - _point(baseline, opts)
    reps = boot.paired_replicates(stat, n, resamples=opts.resamples, rng=rng)
    test = bootstrap_change(
        estimate,
        reps,
        confidence=opts.confidence,
        method="bootstrap-paired",
        n_candidate=n,
        n_baseline=n,
    )
    return Comparison(value_of(candidate, opts), value_of(baseline, opts), test, "rows")


# ---- unpaired ----------------------------------------------------------------------------


def compare_unpaired(
    candidate: Side, baseline: Side, opts: Options, rng: np.random.Generator
) -> Comparison:
    """Candidate's sample against the baseline's own sample (independent rows and labels)."""
    metric = opts.metric
    if is_ranking(metric):
        pc = _per_group(candidate, opts)
        pb = _per_group(baseline, opts)
        if opts.method == "bootstrap":
            reps = boot.unpaired_replicates(
                boot.weighted_mean(pc.values),
                pc.values.size,
                boot.weighted_mean(pb.values),
                pb.values.size,
                resamples=opts.resamples,
                rng=rng,
            )
            test = bootstrap_change(
                pc.mean - pb.mean,
                reps,
                confidence=opts.confidence,
                method="bootstrap-unpaired-groups",
                n_candidate=pc.values.size,
                n_baseline=pb.values.size,
            )
        else:
            test = welch_mean_change(pc.values, pb.values, confidence=opts.confidence)
        return Comparison(pc.mean, pb.mean, test, "groups")
    nc, nb = candidate.score.size, baseline.score.size
    if metric == "auc" and not _needs_bootstrap(opts):
        result = delong_unpaired(candidate.label, candidate.score, baseline.label, baseline.score)
        test = normal_change(
            result.difference,
            result.se,
            confidence=opts.confidence,
            method=result.method,
            n_candidate=nc,
            n_baseline=nb,
        )
        return Comparison(result.candidate, result.baseline, test, "rows")
    if metric in ("logloss", "brier") and not _needs_bootstrap(opts):
        terms = q.log_loss_terms if metric == "logloss" else q.brier_terms
        tc = terms(candidate.label, candidate.score)
        tb = terms(baseline.label, baseline.score)
        test = welch_mean_change(tc, tb, confidence=opts.confidence)
        return Comparison(float(tc.mean()), float(tb.mean()), test, "rows")
    reps = boot.unpaired_replicates(
        _row_statistic(candidate, opts),
        nc,
        _row_statistic(baseline, opts),
        nb,
        resamples=opts.resamples,
        rng=rng,
    )
    estimate = _point(candidate, opts) - _point(baseline, opts)
    test = bootstrap_change(
        estimate,
        reps,
        confidence=opts.confidence,
        method="bootstrap-unpaired",
        n_candidate=nc,
        n_baseline=nb,
    )
    return Comparison(value_of(candidate, opts), value_of(baseline, opts), test, "rows")
