"""AUC and DeLong's tests against outside references."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as sps
from sklearn.metrics import roc_auc_score

from service.stats.auc import (
    auc,
    auc_se,
    delong_paired,
    delong_unpaired,
    hanley_mcneil_se,
    placements,
)

# Hanley & McNeil (1982), Radiology 143:29, Table I (from memory): ratings 1 (definitely
# normal) to 5 (definitely abnormal) of 109 CT images, 58 normal and 51 abnormal.
HM_NORMAL = [33, 6, 6, 11, 2]
HM_ABNORMAL = [3, 2, 2, 11, 33]


def hanley_mcneil_data() -> tuple[np.ndarray, np.ndarray]:
    ratings = np.arange(1, 6, dtype=float)
    score = np.concatenate([np.repeat(ratings, HM_NORMAL), np.repeat(ratings, HM_ABNORMAL)])
    label = np.concatenate([np.zeros(58), np.ones(51)])
    return label, score


def test_hanley_mcneil_table_one() -> None:
    label, score = hanley_mcneil_data()
    assert (label == 0).sum() == 58 and (label == 1).sum() == 51
    area = auc(label, score)
    # Hanley & McNeil (1982), Radiology 143:29, Table I: AUC 0.893 (from memory).
    assert area == pytest.approx(0.893, abs=5e-4)
    # Same paper, SE 0.032 by their formula (from memory).
    assert hanley_mcneil_se(area, 51, 58) == pytest.approx(0.032, abs=5e-4)
    # DeLong's nonparametric SE on rating data is of the same size (common practice, no source:
    # the two agree within about 20% for moderate AUCs).
    _, se = auc_se(label, score)
    assert 0.8 * 0.032 < se < 1.2 * 0.032


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("decimals", [None, 1])
def test_auc_matches_sklearn_and_mann_whitney(seed: int, decimals: int | None) -> None:
    rng = np.random.default_rng(seed)
    n = 3000
    label = (rng.random(n) < 0.2).astype(float)
    score = rng.normal(size=n) + 0.8 * label
    if decimals is not None:
        score = np.round(score, decimals)  # many ties
    ours = auc(label, score)
    # scikit-learn roc_auc_score (trapezoidal area, ties one half)
    assert ours == pytest.approx(roc_auc_score(label, score), abs=1e-12)
    # scipy mannwhitneyu: AUC = U / (n1 n0) with U the statistic of the positives
    u = sps.mannwhitneyu(score[label == 1], score[label == 0]).statistic
    assert ours == pytest.approx(u / ((label == 1).sum() * (label == 0).sum()), abs=1e-12)


def test_auc_small_example_by_hand() -> None:
    # Pairs (pos, neg): (0.35 > 0.1), (0.35 < 0.4), (0.8 > 0.1), (0.8 > 0.4): 3 of 4.
    assert auc([0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8]) == 0.75
    # A tie between a positive and a negative counts one half: (0.5 = 0.5) -> 0.5 of 1 pair.
    assert auc([0, 1], [0.5, 0.5]) == 0.5


def test_auc_needs_both_classes_and_finite_scores() -> None:
    with pytest.raises(ValueError, match="needs both classes"):
        auc([1, 1, 1], [0.1, 0.2, 0.3])
    with pytest.raises(ValueError, match="score contains NaN"):
        auc([0, 1], [0.1, float("nan")])
    with pytest.raises(ValueError, match="differ in length"):
        auc([0, 1, 1], [0.1, 0.2])


def direct_components(label: np.ndarray, score: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """DeLong et al. (1988), Biometrics 44:837, section 2: V10 and V01 by all n*m pairs."""
    x = score[label == 1][:, None]  # positives
    y = score[label == 0][None, :]  # negatives
    psi = (x > y) + 0.5 * (x == y)
    return psi.mean(axis=1), psi.mean(axis=0)


def direct_delong(label: np.ndarray, a: np.ndarray, b: np.ndarray) -> tuple[float, float]:
    """DeLong et al. (1988), eq. 3-4 with contrast (1, -1): difference and its variance."""
    v10a, v01a = direct_components(label, a)
    v10b, v01b = direct_components(label, b)
    s10 = np.cov(np.vstack([v10a, v10b]))
    s01 = np.cov(np.vstack([v01a, v01b]))
    m, n = v10a.size, v01a.size
    c = np.array([1.0, -1.0])
    variance = c @ (s10 / m + s01 / n) @ c
    return float(v10a.mean() - v10b.mean()), float(variance)


@pytest.mark.parametrize("seed", [4, 5, 6, 7])
def test_fast_delong_equals_direct_structural_components(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = 400
    label = (rng.random(n) < 0.35).astype(float)
    a = rng.normal(size=n) + label
    b = a + rng.normal(0.0, 0.7, size=n)
    if seed % 2:
        a, b = np.round(a, 1), np.round(b, 1)  # ties inside and across classes
    diff, variance = direct_delong(label, a, b)
    result = delong_paired(label, a, b)
    assert result.difference == pytest.approx(diff, abs=1e-12)
    assert result.se == pytest.approx(math.sqrt(variance), rel=1e-10)
    # The components themselves, row by row.
    v10, v01 = direct_components(label, a)
    fast = placements(label > 0, a)
    np.testing.assert_allclose(fast.v10, v10, atol=1e-12)
    np.testing.assert_allclose(fast.v01, v01, atol=1e-12)
    # p-value: two-sided normal tail of diff / se.
    assert result.pvalue == pytest.approx(
        2 * sps.norm.sf(abs(diff) / math.sqrt(variance)), rel=1e-9
    )


def test_unpaired_delong_adds_the_two_variances() -> None:
    rng = np.random.default_rng(8)
    la = (rng.random(300) < 0.3).astype(float)
    lb = (rng.random(500) < 0.4).astype(float)
    a = rng.normal(size=300) + la
    b = rng.normal(size=500) + 0.6 * lb
    va10, va01 = direct_components(la, a)
    vb10, vb01 = direct_components(lb, b)
    var_a = va10.var(ddof=1) / va10.size + va01.var(ddof=1) / va01.size
    var_b = vb10.var(ddof=1) / vb10.size + vb01.var(ddof=1) / vb01.size
    result = delong_unpaired(la, a, lb, b)
    assert result.difference == pytest.approx(va10.mean() - vb10.mean(), abs=1e-12)
    assert result.se == pytest.approx(math.sqrt(var_a + var_b), rel=1e-10)


def test_paired_delong_interval_coverage_by_simulation() -> None:
    # A 95% interval covers the true difference in about 95% of repeats. True AUCs of binormal
    # scores: Phi(d / sqrt(2)) for a mean shift d with unit variances (Hanley & McNeil 1982,
    # binormal model). 600 repeats: binomial sd of the coverage 0.9%; tolerance 2.5 points.
    rng = np.random.default_rng(20261201)
    n, repeats, z = 1000, 600, sps.norm.ppf(0.975)
    true_a, true_b = sps.norm.cdf(1.0 / math.sqrt(2)), sps.norm.cdf(0.8 / math.sqrt(2))
    covered = 0
    for _ in range(repeats):
        label = (rng.random(n) < 0.3).astype(float)
        shared = rng.normal(size=n)
        noise_a, noise_b = rng.normal(size=n), rng.normal(size=n)
        # Correlated scores: both share half their variance.
        a = math.sqrt(0.5) * shared + math.sqrt(0.5) * noise_a + 1.0 * label
        b = math.sqrt(0.5) * shared + math.sqrt(0.5) * noise_b + 0.8 * label
        r = delong_paired(label, a, b)
        covered += abs(r.difference - (true_a - true_b)) <= z * r.se
    assert abs(covered / repeats - 0.95) < 0.025


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.tuples(st.booleans(), st.integers(-1000, 1000)), min_size=2, max_size=60).filter(
        lambda rows: 0 < sum(r[0] for r in rows) < len(rows)
    )
)
def test_auc_properties(rows: list[tuple[bool, float]]) -> None:
    label = np.array([r[0] for r in rows], dtype=float)
    # Integer-valued scores, so the transforms below cannot merge two values by rounding.
    score = np.array([r[1] for r in rows], dtype=float)
    area = auc(label, score)
    assert 0.0 <= area <= 1.0
    # Swapping the labels turns AUC into 1 - AUC (ties one half keep the identity exact).
    assert auc(1 - label, score) == pytest.approx(1.0 - area, abs=1e-12)
    # Strictly increasing transforms keep every pairwise order, so the AUC is unchanged.
    assert auc(label, np.arctan(score / 50) * 3 + 7) == pytest.approx(area, abs=1e-12)
    assert auc(label, np.exp(score / 100)) == pytest.approx(area, abs=1e-12)
    assert auc(label, score**3) == pytest.approx(area, abs=1e-12)
    # Reversing the score is 1 - AUC.
    assert auc(label, -score) == pytest.approx(1.0 - area, abs=1e-12)
