"""The weighted bootstrap equals resampling rows explicitly; seeded; close to DeLong."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import roc_auc_score

from service.stats import bootstrap as boot
from service.stats.auc import auc, delong_paired
from service.stats.quality import equal_mass_bins, expected_calibration_error


def data(seed: int, n: int = 400) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    y = (rng.random(n) < 0.3).astype(float)
    a = np.round(rng.normal(size=n) + y, 1)  # ties
    b = a + rng.normal(0, 0.5, n)
    return y, a, b


def test_weights_equal_explicit_resamples() -> None:
    y, a, _ = data(1)
    rng = np.random.default_rng(3)
    n = y.size
    idx = rng.integers(0, n, size=(5, n))
    weights = np.vstack([np.bincount(row, minlength=n) for row in idx]).astype(float)
    ours = boot.weighted_auc(y > 0, a)(weights)
    # scikit-learn roc_auc_score on the resampled rows themselves
    ref = [roc_auc_score(y[row], a[row]) for row in idx]
    np.testing.assert_allclose(ours, ref, rtol=1e-12)
    p = 1 / (1 + np.exp(-a))
    cut = equal_mass_bins(p, 8)
    ece = boot.weighted_binned_abs_sum(p - y, cut.index, 8)(weights)
    direct = [
        np.abs(np.bincount(cut.index[row], weights=(p - y)[row], minlength=8)).sum() / n
        for row in idx
    ]
    np.testing.assert_allclose(ece, direct, rtol=1e-12)
    unit = np.ones((1, n))
    assert boot.weighted_auc(y > 0, a)(unit)[0] == pytest.approx(auc(y, a))
    assert ece.shape == (5,)
    assert boot.weighted_binned_abs_sum(p - y, cut.index, 8)(unit)[0] == pytest.approx(
        expected_calibration_error(y, p, bins=8)
    )


def test_weight_blocks_are_multinomial_and_bounded() -> None:
    rng = np.random.default_rng(4)
    blocks = list(boot.weight_blocks(1000, 25, rng, max_cells=10_000))
    assert [b.shape for b in blocks] == [(10, 1000), (10, 1000), (5, 1000)]
    for block in blocks:
        np.testing.assert_array_equal(block.sum(axis=1), 1000.0)


def test_seeded_and_reproducible() -> None:
    y, a, b = data(2)
    stat = boot.difference(boot.weighted_auc(y > 0, a), boot.weighted_auc(y > 0, b))
    r1 = boot.paired_replicates(stat, y.size, resamples=50, rng=np.random.default_rng(9))
    r2 = boot.paired_replicates(stat, y.size, resamples=50, rng=np.random.default_rng(9))
    np.testing.assert_array_equal(r1, r2)


def test_bootstrap_se_of_paired_auc_change_is_close_to_delong() -> None:
    # Both estimate the same standard error; with 2000 resamples the bootstrap SE has a
    # relative error of about 1/sqrt(2 * 2000) = 1.6%; tolerance 10% (DeLong is asymptotic).
    y, a, b = data(5, n=3000)
    stat = boot.difference(boot.weighted_auc(y > 0, a), boot.weighted_auc(y > 0, b))
    reps = boot.paired_replicates(stat, y.size, resamples=2000, rng=np.random.default_rng(6))
    assert np.std(reps, ddof=1) == pytest.approx(delong_paired(y, a, b).se, rel=0.10)


def test_resamples_validation() -> None:
    with pytest.raises(ValueError, match="resamples must be an integer from 10"):
        next(boot.weight_blocks(10, 5, np.random.default_rng(0)))
