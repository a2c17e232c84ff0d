"""Log loss, Brier, calibration ratio and ECE against outside references."""

from __future__ import annotations

import math

import numpy as np
import pytest
from sklearn.metrics import brier_score_loss, log_loss

from service.stats.quality import (
    LOG_LOSS_EPS,
    brier,
    brier_terms,
    calibration_ratio,
    equal_mass_bins,
    expected_calibration_error,
    log_loss_terms,
)
from service.stats.quality import (
    log_loss as our_log_loss,
)


def sample(seed: int, n: int = 5000) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    p = rng.beta(2, 5, n)
    y = (rng.random(n) < p).astype(float)
    return y, p


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_log_loss_and_brier_match_sklearn(seed: int) -> None:
    y, p = sample(seed)
    # scikit-learn log_loss and brier_score_loss (no probability at 0 or 1, so no clipping)
    assert our_log_loss(y, p) == pytest.approx(log_loss(y, p), rel=1e-12)
    assert brier(y, p) == pytest.approx(brier_score_loss(y, p), rel=1e-12)
    assert log_loss_terms(y, p).mean() == pytest.approx(our_log_loss(y, p), rel=1e-12)
    assert brier_terms(y, p).mean() == pytest.approx(brier(y, p), rel=1e-12)


def test_log_loss_clipping_is_as_stated() -> None:
    # A confident wrong prediction costs -ln(1e-15) = 34.5388 (by hand), not infinity.
    terms = log_loss_terms([1.0, 0.0], [0.0, 1.0])
    # (1 - (1 - 1e-15) is not exactly 1e-15 in binary floating point: relative tolerance 1e-4.)
    np.testing.assert_allclose(terms, -math.log(LOG_LOSS_EPS), rtol=1e-4)
    assert np.all(np.isfinite(terms))
    assert -math.log(LOG_LOSS_EPS) == pytest.approx(34.5388, abs=1e-4)


def test_graded_labels_are_binarised() -> None:
    assert our_log_loss([0, 3], [0.2, 0.7]) == pytest.approx(our_log_loss([0, 1], [0.2, 0.7]))


def test_probability_range_is_enforced() -> None:
    with pytest.raises(ValueError, match=r"score must be probabilities in \[0, 1\]"):
        our_log_loss([0, 1], [0.2, 1.7])
    with pytest.raises(ValueError, match="label must be non-negative"):
        brier([0, -1], [0.2, 0.7])


def test_calibration_ratio_by_hand() -> None:
    # Predictions sum to 0.2 + 0.7 + 0.6 = 1.5 over 1 positive outcome: ratio 1.5 (by hand).
    assert calibration_ratio([0, 1, 0], [0.2, 0.7, 0.6]) == pytest.approx(1.5)
    with pytest.raises(ValueError, match="at least one positive"):
        calibration_ratio([0, 0], [0.2, 0.7])


def test_ece_by_hand_on_two_bins() -> None:
    # Bin 1 (lowest two predictions 0.1, 0.2; outcomes 0, 1): |0.15 - 0.5| = 0.35.
    # Bin 2 (0.8, 0.9; outcomes 1, 1): |0.85 - 1| = 0.15. ECE = (2/4) 0.35 + (2/4) 0.15 = 0.25.
    assert expected_calibration_error([0, 1, 1, 1], [0.1, 0.2, 0.8, 0.9], bins=2) == pytest.approx(
        0.25
    )


def test_ece_against_direct_definition() -> None:
    # Naeini et al. (2015), AAAI: ECE = sum_b (n_b / n) |mean_b(p) - mean_b(y)|, equal-mass bins.
    y, p = sample(7, 2003)
    bins = 15
    order = np.argsort(p, kind="stable")
    rank_bin = np.arange(p.size) * bins // p.size  # rank r goes to bin floor(r B / n)
    chunks = [order[rank_bin == b] for b in range(bins)]
    direct = sum(len(c) / p.size * abs(p[c].mean() - y[c].mean()) for c in chunks)
    assert expected_calibration_error(y, p, bins=bins) == pytest.approx(direct, rel=1e-12)
    cut = equal_mass_bins(p, bins)
    assert cut.size.max() - cut.size.min() <= 1


def test_well_calibrated_scores_have_small_ece() -> None:
    # Outcomes drawn with exactly the predicted probability: ECE shrinks like 1/sqrt(n/B).
    y, p = sample(11, 200_000)
    assert expected_calibration_error(y, p, bins=10) < 0.01
    assert calibration_ratio(y, p) == pytest.approx(1.0, abs=0.02)
