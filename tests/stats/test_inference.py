"""Change tests: t intervals against scipy, MDE against statsmodels, coverage by simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps
from statsmodels.stats.power import NormalIndPower

from service.stats import bootstrap as boot
from service.stats.inference import (
    against_boundary,
    bootstrap_change,
    minimum_detectable_effect,
    normal_change,
    oriented_interval,
    paired_mean_change,
    welch_mean_change,
)


def test_paired_t_matches_scipy_ttest_rel() -> None:
    rng = np.random.default_rng(1)
    a = rng.normal(size=80)
    b = a + rng.normal(0.1, 0.5, size=80)
    ours = paired_mean_change(b - a, confidence=0.9)
    ref = sps.ttest_rel(b, a)  # scipy.stats.ttest_rel
    assert ours.pvalue == pytest.approx(ref.pvalue, rel=1e-10)
    ci = ref.confidence_interval(confidence_level=0.9)
    assert ours.interval == pytest.approx((ci.low, ci.high), rel=1e-10)


def test_welch_matches_scipy_ttest_ind() -> None:
    rng = np.random.default_rng(2)
    a = rng.normal(0.0, 1.0, size=60)
    b = rng.normal(0.3, 2.0, size=90)
    ours = welch_mean_change(b, a, confidence=0.95)
    ref = sps.ttest_ind(b, a, equal_var=False)  # scipy.stats.ttest_ind, Welch
    assert ours.pvalue == pytest.approx(ref.pvalue, rel=1e-10)
    assert ours.df == pytest.approx(ref.df, rel=1e-10)
    ci = ref.confidence_interval(confidence_level=0.95)
    assert ours.interval == pytest.approx((ci.low, ci.high), rel=1e-10)


def test_mde_matches_statsmodels_power() -> None:
    # statsmodels NormalIndPower: standardised effect detectable with n per group at alpha and
    # power; the standard error of a difference of two means of unit variance is sqrt(2 / n).
    n = 500
    ref = NormalIndPower().solve_power(nobs1=n, alpha=0.05, power=0.8, ratio=1.0)
    ours = minimum_detectable_effect(math.sqrt(2 / n), confidence=0.95, power=0.8)
    # statsmodels also counts the far tail (power 0.8 exactly); ours ignores it: < 0.1% apart.
    assert ours == pytest.approx(ref, rel=1e-3)


def test_boundary_tests_agree_with_the_interval() -> None:
    # The lower end of a two-sided c interval is above b exactly when the one-sided p-value of
    # H0 "gain <= b" is below (1 - c) / 2 (the usual non-inferiority convention, Piaggio 2012).
    test = normal_change(-0.001, 0.002, confidence=0.95, method="x", n_candidate=1, n_baseline=1)
    for boundary in (-0.006, -0.005, -0.0049, -0.003, 0.0):
        bt = against_boundary(test, boundary)
        assert (test.interval[0] > boundary) == (bt.p_above < 0.025)
        assert (test.interval[1] < boundary) == (bt.p_below < 0.025)
        assert bt.p_above + bt.p_below == pytest.approx(1.0)
    # Lower-is-better metrics: sign -1 turns the change into a gain.
    flipped = against_boundary(test, -0.005, sign=-1.0)
    assert flipped.p_above == pytest.approx(sps.norm.sf((0.001 + 0.005) / 0.002))
    assert oriented_interval(test, -1.0) == pytest.approx((-test.interval[1], -test.interval[0]))


def test_bootstrap_change_percentile_interval_and_pvalue() -> None:
    reps = np.linspace(-1.0, 3.0, 401)  # 401 equally spaced replicates
    result = bootstrap_change(1.0, reps, confidence=0.9, method="b", n_candidate=1, n_baseline=1)
    assert result.interval == pytest.approx(tuple(np.quantile(reps, [0.05, 0.95])))
    below = (1 + np.sum(reps <= 0)) / 402  # Efron & Tibshirani (1993) ch. 16, +1 correction
    assert result.pvalue == pytest.approx(2 * below)
    bt = against_boundary(result, -0.5)
    assert bt.p_above == pytest.approx((1 + np.sum(reps <= -0.5)) / 402)


def test_bootstrap_change_refuses_mostly_undefined_replicates() -> None:
    reps = np.array([np.nan] * 20 + [0.1] * 80)
    with pytest.raises(ValueError, match="too small for this statistic"):
        bootstrap_change(0.1, reps, method="b", n_candidate=1, n_baseline=1)


def test_paired_t_interval_coverage_by_simulation() -> None:
    # 95% intervals cover the true mean difference in about 95% of 2000 repeats (binomial sd
    # 0.5%); tolerance 1.5 points. Skewed (exponential) differences, n = 200.
    rng = np.random.default_rng(20261202)
    covered = 0
    for _ in range(2000):
        d = rng.exponential(1.0, 200) - 1.0
        lo, hi = paired_mean_change(d, confidence=0.95).interval
        covered += lo <= 0.0 <= hi
    assert abs(covered / 2000 - 0.95) < 0.015


def test_validation() -> None:
    with pytest.raises(ValueError, match="confidence must be in"):
        paired_mean_change([1.0, 2.0], confidence=1.0)
    with pytest.raises(ValueError, match="differences needs at least 2"):
        paired_mean_change([1.0])
    with pytest.raises(ValueError, match="power must be in"):
        minimum_detectable_effect(0.1, power=1.5)


def test_bootstrap_percentile_interval_coverage_by_simulation() -> None:
    # The seeded bootstrap's 95% percentile interval of a mean covers the true mean in about
    # 95% of repeats. Skewed data (exponential, n = 300) makes the percentile interval slightly
    # short (Efron & Tibshirani 1993, ch. 14); 300 repeats have a binomial sd of 1.3%:
    # tolerance 4 points.
    rng = np.random.default_rng(20261204)
    covered = 0
    for _ in range(300):
        x = rng.exponential(1.0, 300)
        reps = boot.paired_replicates(boot.weighted_mean(x), x.size, resamples=400, rng=rng)
        test = bootstrap_change(float(x.mean()), reps, method="b", n_candidate=300, n_baseline=300)
        covered += test.interval[0] <= 1.0 <= test.interval[1]
    assert abs(covered / 300 - 0.95) < 0.04


def test_welch_interval_coverage_by_simulation() -> None:
    # Unequal variances and sizes: Welch's 95% interval covers the true difference (0.2) in
    # about 95% of 2000 repeats (binomial sd 0.5%); tolerance 1.5 points.
    rng = np.random.default_rng(20261205)
    covered = 0
    for _ in range(2000):
        a = rng.normal(0.2, 3.0, 40)
        b = rng.normal(0.0, 1.0, 400)
        lo, hi = welch_mean_change(a, b).interval
        covered += lo <= 0.2 <= hi
    assert abs(covered / 2000 - 0.95) < 0.015
