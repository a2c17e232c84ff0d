"""Paired change statistics against scipy, statsmodels and direct definitions."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as sps
from statsmodels.stats.proportion import proportion_confint

from service.stats.agreement import (
    mean_abs_change,
    midranks,
    spearman,
    threshold_churn,
    top_k_churn,
    wilson_interval,
)


def scores(seed: int, n: int = 2000) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    b = rng.random(n)
    return np.clip(b + rng.normal(0, 0.1, n), 0, 1), b


def test_midranks_match_scipy_rankdata() -> None:
    x = np.round(np.random.default_rng(1).normal(size=500), 1)
    np.testing.assert_allclose(midranks(x), sps.rankdata(x), rtol=0, atol=0)


@pytest.mark.parametrize("decimals", [None, 1])
def test_spearman_matches_scipy(decimals: int | None) -> None:
    c, b = scores(2)
    if decimals is not None:
        c, b = np.round(c, decimals), np.round(b, decimals)
    assert spearman(c, b).statistic == pytest.approx(sps.spearmanr(c, b).statistic, abs=1e-12)


def test_spearman_interval_coverage_by_simulation() -> None:
    # Bonett & Wright (2000): the Fisher-z interval with variance (1 + r^2/2)/(n - 3) covers the
    # population Spearman correlation in about 95% of repeats. Bivariate normal with Pearson
    # rho = 0.8 has Spearman (6/pi) asin(rho/2) (Pearson 1907); 500 repeats, tolerance 3 points.
    rng = np.random.default_rng(20261203)
    rho = 0.8
    true = 6 / np.pi * np.arcsin(rho / 2)
    covered = 0
    for _ in range(500):
        x = rng.normal(size=300)
        y = rho * x + np.sqrt(1 - rho**2) * rng.normal(size=300)
        lo, hi = spearman(x, y).interval
        covered += lo <= true <= hi
    assert abs(covered / 500 - 0.95) < 0.03


def test_mean_abs_change_and_threshold_churn_by_hand() -> None:
    c = np.array([0.1, 0.6, 0.4, 0.9])
    b = np.array([0.2, 0.4, 0.6, 0.9])
    assert mean_abs_change(c, b).statistic == pytest.approx((0.1 + 0.2 + 0.2 + 0.0) / 4)
    # At 0.5: row 2 goes from no to yes, row 3 from yes to no: 2 of 4 flip.
    assert threshold_churn(c, b, threshold=0.5).statistic == 0.5


def test_wilson_matches_statsmodels() -> None:
    for k, n in [(0, 50), (7, 200), (199, 200)]:
        ref = proportion_confint(k, n, alpha=0.05, method="wilson")  # statsmodels
        assert wilson_interval(k, n, 0.95) == pytest.approx(ref, rel=1e-10)


def test_top_k_churn_by_direct_definition() -> None:
    rng = np.random.default_rng(3)
    groups, size, k = 40, 9, 3
    codes = np.repeat(np.arange(groups), size)
    c, b = rng.random(groups * size), rng.random(groups * size)
    moved = 0
    for g in range(groups):
        rows = np.flatnonzero(codes == g)
        top_c = set(rows[np.argsort(-c[rows])][:k])
        top_b = set(rows[np.argsort(-b[rows])][:k])
        moved += len(top_c - top_b)
    result = top_k_churn(codes, c, b, k=k)
    assert result.statistic == pytest.approx(moved / (groups * k))
    assert top_k_churn(codes, c, c, k=k).statistic == 0.0
