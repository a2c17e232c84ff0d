"""Quality of predicted probabilities against 0/1 outcomes.

Functions
---------
log_loss_terms, log_loss
    Binary cross-entropy per row and its mean, with probabilities clipped to
    ``[eps, 1 - eps]``, ``eps = 1e-15`` [1].
brier_terms, brier
    Squared error of the probability per row and its mean [2].
calibration_ratio
    Sum of predicted probabilities over the number of positive outcomes (1 is calibrated).
expected_calibration_error
    ECE on equal-mass bins of the prediction [3], [4].

Labels are binarised: a label above 0 is a positive outcome, so graded relevance can be used.
Predictions must lie in [0, 1]; anything else raises ``ValueError`` naming the parameter (a score
that is not a probability cannot have a log loss).

References
----------
1. Good, I. J. (1952). Rational decisions. Journal of the Royal Statistical Society B 14(1),
   107–114. (Logarithmic scoring rule.)
2. Brier, G. W. (1950). Verification of forecasts expressed in terms of probability. Monthly
   Weather Review 78(1), 1–3.
3. Naeini, M. P., Cooper, G. F. & Hauskrecht, M. (2015). Obtaining well calibrated probabilities
   using Bayesian binning. AAAI 2015, 2901–2907. (ECE.)
4. Nixon, J., Dusenberry, M., Zhang, L., Jerfel, G. & Tran, D. (2019). Measuring calibration in
   deep learning. CVPR Workshops. (Equal-mass, "adaptive", bins.)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.stats.validation import finite_1d

#: Probabilities are clipped to [LOG_LOSS_EPS, 1 - LOG_LOSS_EPS] before the logarithm, so a
#: confident wrong prediction costs at most -ln(1e-15) = 34.5 instead of infinity.
LOG_LOSS_EPS = 1e-15


def probabilities(values: object, name: str = "score") -> np.ndarray:
    """*values* as finite float64 in [0, 1], or ValueError naming *name*."""
    array = finite_1d(values, name)
    if array.size and (array.min() < 0.0 or array.max() > 1.0):
        raise ValueError(
            f"{name} must be probabilities in [0, 1] for this metric "
            f"(found {array.min():.4g} to {array.max():.4g})"
        )
    return array


def outcomes(label: object, name: str = "label") -> np.ndarray:
    """*label* as float64 0/1 outcomes: 1 where the label is above 0."""
    array = finite_1d(label, name)
    if array.size and array.min() < 0:
        raise ValueError(f"{name} must be non-negative (0/1 or graded relevance)")
    return (array > 0).astype(np.float64)


def _pair(label: object, score: object) -> tuple[np.ndarray, np.ndarray]:
    y = outcomes(label)
    p = probabilities(score)
    if y.size != p.size:
        raise ValueError(f"label and score differ in length ({y.size} vs {p.size})")
    if y.size == 0:
        raise ValueError("label and score need at least one row")
    return y, p


def log_loss_terms(label: object, score: object) -> np.ndarray:
    """Per-row log loss ``-(y ln p + (1 - y) ln(1 - p))``, p clipped as :data:`LOG_LOSS_EPS`."""
    y, p = _pair(label, score)
    p = np.clip(p, LOG_LOSS_EPS, 1.0 - LOG_LOSS_EPS)
    # Only one logarithm per row: the probability given to the outcome that happened.
    return np.asarray(-np.log(np.where(y > 0, p, 1.0 - p)), dtype=np.float64)


def log_loss(label: object, score: object) -> float:
    """Mean log loss (binary cross-entropy) [1]; see :func:`log_loss_terms` for the clipping.

    Examples
    --------
    >>> round(log_loss([0, 1], [0.2, 0.7]), 4)
    0.2899
    """
    return float(np.mean(log_loss_terms(label, score)))


def brier_terms(label: object, score: object) -> np.ndarray:
    """Per-row squared error ``(p - y)²``."""
    y, p = _pair(label, score)
    return np.asarray((p - y) ** 2, dtype=np.float64)


def brier(label: object, score: object) -> float:
    """Brier score: mean squared error of the probability [2].

    Examples
    --------
    >>> brier([0, 1], [0.2, 0.7])
    0.065
    """
    return float(np.mean(brier_terms(label, score)))


def calibration_ratio(label: object, score: object) -> float:
    """Sum of predictions over the number of positive outcomes; above 1 over-predicts.

    Raises ValueError when the sample has no positive outcome (the ratio is undefined).
    """
    y, p = _pair(label, score)
    positives = float(y.sum())
    if positives == 0:
        raise ValueError("calibration ratio needs at least one positive label")
    return float(p.sum() / positives)


@dataclass(frozen=True)
class Bins:
    """Equal-mass bins of a prediction: ``index[i]`` is row i's bin, ``size[b]`` rows per bin."""

    index: np.ndarray
    size: np.ndarray
    edges: np.ndarray


def equal_mass_bins(score: np.ndarray, bins: int, *, order: np.ndarray | None = None) -> Bins:
    """Cut the rows into *bins* groups of (nearly) equal count by rank of *score*.

    Rows are ranked by score (ties broken by position, so equal scores may straddle two bins)
    and rank r goes to bin ``floor(r * bins / n)``. ``edges`` holds the score at each cut.
    """
    n = score.size
    if not isinstance(bins, int) or bins < 1:
        raise ValueError(f"bins must be a positive integer, got {bins!r}")
    bins = min(bins, n)
    if order is None:
        order = np.argsort(score, kind="stable")
    index = np.empty(n, dtype=np.int64)
    index[order] = (np.arange(n, dtype=np.int64) * bins) // n
    size = np.bincount(index, minlength=bins)
    cuts = np.cumsum(size)[:-1]
    edges = score[order][cuts] if cuts.size else np.empty(0)
    return Bins(index=index, size=size, edges=edges)


def expected_calibration_error(
    label: object, score: object, *, bins: int = 10, weights: np.ndarray | None = None
) -> float:
    """Expected calibration error on equal-mass bins [3], [4].

    Parameters
    ----------
    label, score : array_like
        Outcomes (positive above 0) and predicted probabilities.
    bins : int, default 10
        Number of bins, each holding about ``n / bins`` rows (fewer bins when n is smaller).
    weights : ndarray, optional
        Row weights (bootstrap counts); bins stay those of the unweighted sample.

    Returns
    -------
    float
        ``sum_b (n_b / n) |mean_b(p) - mean_b(y)| = (1/n) sum_b |sum_{i in b} (p_i - y_i)|``.

    Notes
    -----
    Equal-mass bins put the same number of rows in each bin, so no bin is empty and each bin's
    gap is estimated with equal precision; with equal-width bins most rows of a skewed score fall
    into one or two bins. ECE is biased upward in small samples (each |gap| is at least its noise).
    """
    y, p = _pair(label, score)
    cut = equal_mass_bins(p, bins)
    return ece_from_bins(p - y, cut, weights=weights)


def ece_from_bins(gap: np.ndarray, cut: Bins, *, weights: np.ndarray | None = None) -> float:
    """ECE from per-row gaps ``p - y`` and fixed bins (see :func:`expected_calibration_error`)."""
    nb = cut.size.size
    if weights is None:
        sums = np.bincount(cut.index, weights=gap, minlength=nb)
        return float(np.abs(sums).sum() / gap.size)
    sums = np.bincount(cut.index, weights=gap * weights, minlength=nb)
    return float(np.abs(sums).sum() / weights.sum())
