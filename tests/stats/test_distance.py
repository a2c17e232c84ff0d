"""JS, Wasserstein, Anderson-Darling and shifts against scipy and published values."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import stats as sps
from scipy.spatial.distance import jensenshannon

from service.stats.distance import (
    _ad_inf_cdf,
    anderson_ksamp,
    jensen_shannon,
    mean_shift,
    quantile_shift,
    wasserstein,
)


def pair(seed: int, shift: float, n: int = 3000, m: int = 2000) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return rng.beta(2, 5, n), np.clip(rng.beta(2, 5, m) + shift, 0, 1)


@pytest.mark.parametrize("shift", [0.0, 0.02, 0.2])
def test_jensen_shannon_matches_scipy(shift: float) -> None:
    base, cand = pair(1, shift)
    result = jensen_shannon(base, cand, bins=10)
    # scipy.spatial.distance.jensenshannon on the same bin shares, base 2
    assert result.statistic == pytest.approx(
        jensenshannon(result.baseline_share, result.candidate_share, base=2), abs=1e-12
    )
    # p-value: G-test of homogeneity; scipy chi2_contingency with the log-likelihood ratio
    edges = np.array(result.edges)
    table = np.vstack(
        [
            np.bincount(np.searchsorted(edges, base, side="left"), minlength=edges.size + 1),
            np.bincount(np.searchsorted(edges, cand, side="left"), minlength=edges.size + 1),
        ]
    )
    g = sps.chi2_contingency(table, lambda_="log-likelihood", correction=False)
    assert result.pvalue == pytest.approx(g.pvalue, rel=1e-9, abs=1e-300)


def test_jensen_shannon_bounds() -> None:
    base = np.linspace(0, 1, 1000)
    assert jensen_shannon(base, base).statistic == pytest.approx(0.0, abs=1e-12)
    # Disjoint supports: every candidate value beyond the last baseline edge -> distance 1.
    assert jensen_shannon(base, base + 5.0, bins=2).statistic == pytest.approx(
        jensenshannon([0.5, 0.5], [0.0, 1.0], base=2), abs=1e-12
    )


@pytest.mark.parametrize("spread", ["std", "iqr"])
def test_wasserstein_matches_scipy(spread: str) -> None:
    base, cand = pair(2, 0.05)
    cand = np.round(cand, 2)  # ties
    scale = (
        np.std(base, ddof=1) if spread == "std" else np.subtract(*np.quantile(base, [0.75, 0.25]))
    )
    # scipy.stats.wasserstein_distance divided by the stated spread
    expected = sps.wasserstein_distance(base, cand) / scale
    assert wasserstein(base, cand, spread=spread).statistic == pytest.approx(expected, rel=1e-10)  # type: ignore[arg-type]


def test_wasserstein_of_a_shift_is_the_shift() -> None:
    # W1 between a sample and the same sample moved by c is c (Vallender 1974).
    base = np.random.default_rng(3).normal(size=500)
    result = wasserstein(base, base + 0.25)
    assert result.statistic * np.std(base, ddof=1) == pytest.approx(0.25, rel=1e-10)
    with pytest.raises(ValueError, match="baseline's std is 0"):
        wasserstein(np.ones(10), base)


@pytest.mark.parametrize(
    ("seed", "shift", "decimals"), [(1, 0.0, None), (2, 0.1, None), (3, 0.15, 1), (4, 0.05, 2)]
)
def test_anderson_ksamp_matches_scipy(seed: int, shift: float, decimals: int | None) -> None:
    rng = np.random.default_rng(seed)
    a, b = rng.normal(size=300), rng.normal(shift, 1.0, size=200)
    if decimals is not None:
        a, b = np.round(a, decimals), np.round(b, decimals)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scipy warns when it caps the p-value
        ref = sps.anderson_ksamp([a, b], variant="midrank")  # Scholz & Stephens (1987), eq. 7
    ours = anderson_ksamp(a, b)
    assert ours.statistic == pytest.approx(ref.statistic, rel=1e-10)
    if 0.001 < ref.pvalue < 0.25:
        assert ours.pvalue_method == "interpolated"
        assert ours.pvalue == pytest.approx(ref.pvalue, rel=1e-8)


def test_anderson_three_samples_matches_scipy() -> None:
    rng = np.random.default_rng(5)
    samples = [rng.normal(0.1 * i, 1.0, size=150 + 50 * i) for i in range(3)]
    ref = sps.anderson_ksamp(samples, variant="midrank")
    ours = anderson_ksamp(*samples)
    assert ours.statistic == pytest.approx(ref.statistic, rel=1e-10)


def test_anderson_darling_limit_percentage_points() -> None:
    # Anderson & Darling (1954), asymptotic percentage points (from memory): 1.933 (10%),
    # 2.492 (5%), 3.857 (1%); the Marsaglia & Marsaglia (2004) ADinf approximation matches.
    for z, tail in [(1.933, 0.10), (2.492, 0.05), (3.857, 0.01)]:
        assert 1.0 - _ad_inf_cdf(z) == pytest.approx(tail, abs=5e-4)


def test_anderson_far_tail_uses_the_limit_distribution() -> None:
    rng = np.random.default_rng(6)
    result = anderson_ksamp(rng.normal(size=5000), rng.normal(0.3, 1.0, size=5000))
    assert result.pvalue_method == "asymptotic"
    assert 0.0 <= result.pvalue < 0.001


def test_mean_and_quantile_shift() -> None:
    base, cand = pair(7, 0.05)
    result = mean_shift(base, cand)
    assert result.statistic == pytest.approx(abs(cand.mean() - base.mean()) / np.std(base, ddof=1))
    # scipy.stats.ttest_ind (Welch) gives the p-value
    assert result.pvalue == pytest.approx(
        sps.ttest_ind(cand, base, equal_var=False).pvalue, rel=1e-9
    )
    shift, per_level = quantile_shift(base, base + 0.1)
    assert shift.statistic == pytest.approx(0.1 / np.std(base, ddof=1), rel=1e-9)
    assert set(per_level) == {
        "q0.01",
        "q0.05",
        "q0.1",
        "q0.25",
        "q0.5",
        "q0.75",
        "q0.9",
        "q0.95",
        "q0.99",
    }
