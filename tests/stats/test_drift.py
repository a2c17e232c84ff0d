"""PSI and KS against outside references."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as sps

from service.stats.drift import ks_2samp, psi, psi_null_quantile


@pytest.mark.parametrize(
    ("n", "m", "shift", "seed"),
    [(50, 70, 0.0, 1), (1000, 800, 0.1, 2), (5000, 5000, 0.0, 3), (3000, 200, 0.5, 4)],
)
def test_ks_matches_scipy_asymptotic(n: int, m: int, shift: float, seed: int) -> None:
    rng = np.random.default_rng(seed)
    x, y = rng.normal(size=n), rng.normal(shift, 1.0, size=m)
    ours = ks_2samp(x, y)
    ref = sps.ks_2samp(x, y, method="asymp")  # scipy.stats.ks_2samp, asymptotic method
    assert ours.statistic == pytest.approx(ref.statistic, abs=1e-12)
    assert ours.pvalue == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-15)


def test_ks_with_ties_matches_scipy() -> None:
    rng = np.random.default_rng(11)
    x = rng.integers(0, 10, 400).astype(float)
    y = rng.integers(1, 11, 300).astype(float)
    assert ks_2samp(x, y).statistic == pytest.approx(sps.ks_2samp(x, y).statistic, abs=1e-12)


def test_ks_critical_value_at_005() -> None:
    # Smirnov (1948) asymptotic table: c(0.05) = 1.358 for the two-sample test.
    n = m = 200_000
    d_crit = 1.358 * np.sqrt((n + m) / (n * m))
    assert sps.kstwobign.isf(0.05) == pytest.approx(1.358, abs=5e-4)
    x = np.arange(n, dtype=float)
    # Shift y so that D equals d_crit exactly: y = x + d_crit * n.
    y = x + round(d_crit * n)
    result = ks_2samp(x, y)
    assert result.statistic == pytest.approx(d_crit, abs=1e-5)
    assert result.pvalue == pytest.approx(0.05, abs=0.002)


def test_ks_rejects_nan() -> None:
    with pytest.raises(ValueError, match="candidate contains NaN"):
        ks_2samp([1.0, 2.0], [1.0, float("nan")])


def test_psi_of_identical_samples_is_zero_and_symmetric_terms_nonnegative() -> None:
    rng = np.random.default_rng(5)
    x = rng.normal(size=4000)
    assert psi(x, x).statistic == pytest.approx(0.0, abs=1e-12)
    shifted = psi(x, x + 0.5)
    assert shifted.statistic > 0.1


def test_psi_by_hand_on_known_proportions() -> None:
    # PSI = sum (a - e) ln(a / e); with e = (0.5, 0.5) and a = (0.8, 0.2):
    # (0.3) ln(1.6) + (-0.3) ln(0.4) = 0.3 * 0.470004 + 0.3 * 0.916291 = 0.415888 (by hand)
    base = np.array([0.0] * 500 + [1.0] * 500)
    cand = np.array([0.0] * 800 + [1.0] * 200)
    result = psi(base, cand, bins=2, smoothing=0.0)
    assert result.statistic == pytest.approx(0.415888, abs=1e-5)


def test_psi_null_distribution_by_simulation() -> None:
    # Yurdakul (2018), from memory: under no change PSI ~ (1/n + 1/m) * chi2(B - 1).
    rng = np.random.default_rng(20261201)
    n, m, bins, reps = 4000, 3000, 10, 2000
    values = np.array(
        [psi(rng.normal(size=n), rng.normal(size=m), bins=bins).statistic for _ in range(reps)]
    )
    scale = 1 / n + 1 / m
    expected_mean = scale * (bins - 1)
    # Tolerance: 5% of the mean (the simulation's standard error is about 0.7%).
    assert values.mean() == pytest.approx(expected_mean, rel=0.05)
    q99 = psi_null_quantile(n, m, bins, 0.99)
    assert np.quantile(values, 0.99) == pytest.approx(q99, rel=0.15)
    # Share of null PSI values beyond the 99% quantile is about 1% (binomial sd 0.22%).
    assert abs(np.mean(values > q99) - 0.01) < 0.008


def test_psi_bands() -> None:
    # common practice, no source: PSI < 0.1 stable, 0.1-0.25 moderate, > 0.25 large shift.
    rng = np.random.default_rng(9)
    base = rng.normal(size=20000)
    small = psi(base, rng.normal(0.05, 1.0, 20000)).statistic
    large = psi(base, rng.normal(0.8, 1.0, 20000)).statistic
    assert small < 0.1
    assert large > 0.25


def test_psi_validates_bins() -> None:
    with pytest.raises(ValueError, match="bins must be an integer from 2 to 1000"):
        psi([1.0, 2.0, 3.0], [1.0, 2.0, 3.0], bins=1)
