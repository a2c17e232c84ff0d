"""Area under the ROC curve and DeLong's tests for a change in AUC.

Functions
---------
auc
    AUC with ties counted one half (the Mann–Whitney form), O(n log n).
placements
    Per-row placement values (DeLong's structural components), from one sort.
delong_paired
    Change in AUC between two scores of the same rows (correlated ROC curves) [1], [2].
delong_unpaired
    Change in AUC between two independent labelled samples [1].
hanley_mcneil_se
    Standard error of an AUC from its value and class sizes alone [3].

References
----------
1. DeLong, E. R., DeLong, D. M. & Clarke-Pearson, D. L. (1988). Comparing the areas under two
   or more correlated receiver operating characteristic curves: a nonparametric approach.
   Biometrics 44(3), 837–845.
2. Sun, X. & Xu, W. (2014). Fast implementation of DeLong's algorithm for comparing the areas
   under correlated receiver operating characteristic curves. IEEE Signal Processing Letters
   21(11), 1389–1393.
3. Hanley, J. A. & McNeil, B. J. (1982). The meaning and use of the area under a receiver
   operating characteristic (ROC) curve. Radiology 143(1), 29–36.
4. Mann, H. B. & Whitney, D. R. (1947). On a test of whether one of two random variables is
   stochastically larger than the other. Annals of Mathematical Statistics 18(1), 50–60.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats as sps

from service.stats.parallel import both
from service.stats.validation import finite_1d


@dataclass(frozen=True)
class Placements:
    """DeLong's structural components of one score on one labelled sample.

    ``v10[i]`` (one per positive row, in row order) is the share of negatives scored below
    positive *i*, ties counted one half; ``v01[j]`` (one per negative row) is the share of
    positives scored above negative *j*. The AUC is the mean of either.
    """

    v10: np.ndarray
    v01: np.ndarray

    @property
    def auc(self) -> float:
        return float(np.mean(self.v10))


@dataclass(frozen=True)
class AUCChange:
    """A change in AUC, candidate minus baseline, with DeLong's standard error."""

    candidate: float
    baseline: float
    difference: float
    se: float
    #: Two-sided p-value of "no change" (normal approximation of [1]).
    pvalue: float
    n_positive: int
    n_negative: int
    method: str


def binary_labels(label: object, name: str = "label") -> np.ndarray:
    """*label* as a boolean array: positive where the label is above 0 (graded labels allowed)."""
    values = finite_1d(label, name)
    if np.any(values < 0):
        raise ValueError(f"{name} must be non-negative (0/1 or graded relevance)")
    return values > 0


def _check_classes(positive: np.ndarray, what: str = "label") -> tuple[int, int]:
    n1 = int(np.count_nonzero(positive))
    n0 = int(positive.size - n1)
    if n1 == 0 or n0 == 0:
        raise ValueError(
            f"{what} needs both classes for an AUC, got {n1} positive and {n0} negative rows"
        )
    return n1, n0


@dataclass(frozen=True)
class _TieCounts:
    """Class counts per tie group of the sorted scores (one sort, then running sums)."""

    pos_sorted: np.ndarray
    pos_before: np.ndarray
    pos_in: np.ndarray
    neg_before: np.ndarray
    neg_in: np.ndarray
    #: Tie group of each sorted position; None when no two scores tie (group = position).
    group: np.ndarray | None

    @classmethod
    def of(cls, positive: np.ndarray, score: np.ndarray, order: np.ndarray) -> _TieCounts:
        n = score.size
        s = score[order]
        pos_sorted = positive[order]
        new = np.empty(n, dtype=bool)
        new[0] = True
        np.not_equal(s[1:], s[:-1], out=new[1:])
        starts = np.flatnonzero(new)
        ends = np.append(starts[1:], n)
        cum_pos = np.concatenate(([0], np.cumsum(pos_sorted, dtype=np.int64)))
        pos_before = cum_pos[starts]
        pos_in = cum_pos[ends] - pos_before
        return cls(
            pos_sorted=pos_sorted,
            pos_before=pos_before,
            pos_in=pos_in,
            neg_before=starts - pos_before,
            neg_in=(ends - starts) - pos_in,
            group=None if starts.size == n else np.cumsum(new) - 1,
        )


def has_ties(score: np.ndarray, order: np.ndarray) -> bool:
    """Whether two scores are equal (from ``order = argsort(score)``)."""
    s = score[order]
    return bool(np.any(s[1:] == s[:-1]))


def sorted_placements(
    pos_sorted: np.ndarray, n1: int, n0: int, s_sorted: np.ndarray | None = None
) -> np.ndarray:
    """Placement values in sorted order: V10 at positives, V01 at negatives (Sun & Xu [2]).

    *pos_sorted* are the classes of the rows in ascending score order; *s_sorted* their scores
    when ties are possible (None: no two scores are equal).
    """
    n = pos_sorted.size
    if s_sorted is None or n < 2:
        # No ties: a positive at sorted place i has i - (positives before) negatives below; a
        # negative has n1 - (positives before) positives above.
        before = np.cumsum(pos_sorted, dtype=np.int64)
        before -= pos_sorted
        below = np.arange(n, dtype=np.int64) - before
        return np.where(pos_sorted, below * (1.0 / n0), (n1 - before) * (1.0 / n1))
    new = np.empty(n, dtype=bool)
    new[0] = True
    np.not_equal(s_sorted[1:], s_sorted[:-1], out=new[1:])
    starts = np.flatnonzero(new)
    ends = np.append(starts[1:], n)
    cum = np.concatenate(([0], np.cumsum(pos_sorted, dtype=np.int64)))
    pos_before = cum[starts]
    pos_in = cum[ends] - pos_before
    neg_before = starts - pos_before
    neg_in = (ends - starts) - pos_in
    # Positive rows: negatives below plus half the tied negatives; negative rows: positives above
    # plus half the tied positives (Sun & Xu [2], eq. 9-10, in count form).
    below_t = (neg_before + 0.5 * neg_in) / n0
    above_t = ((n1 - pos_before - pos_in) + 0.5 * pos_in) / n1
    if starts.size < n:
        group = np.cumsum(new) - 1
        below_t, above_t = below_t[group], above_t[group]
    return np.asarray(np.where(pos_sorted, below_t, above_t), dtype=np.float64)


def _row_placements(
    positive: np.ndarray,
    score: np.ndarray,
    order: np.ndarray,
    n1: int,
    n0: int,
    ties: bool | None = None,
) -> np.ndarray:
    """Placement value of every row, in row order: V10 for positives, V01 for negatives.

    *ties* False promises that no two scores are equal (skips the check); None: check.
    """
    s_sorted = None
    if ties is None or ties:
        s_sorted = score[order]
        if ties is None and not np.any(s_sorted[1:] == s_sorted[:-1]):
            s_sorted = None
    per_row = np.empty(score.size, dtype=np.float64)
    per_row[order] = sorted_placements(positive[order], n1, n0, s_sorted)
    return per_row


def placements(
    positive: np.ndarray, score: np.ndarray, *, order: np.ndarray | None = None
) -> Placements:
    """Structural components of DeLong [1] from one sort, as in Sun & Xu [2].

    Parameters
    ----------
    positive : ndarray of bool
        True for positive rows.
    score : ndarray of float64
        Finite scores, same length.
    order : ndarray of int, optional
        ``np.argsort(score)`` when the caller already has it (any tie order).

    Returns
    -------
    Placements

    Notes
    -----
    Sun & Xu write ``V10_i = (T_Z(i) - T_X(i)) / n0`` with ``T_Z`` the midrank among all rows and
    ``T_X`` the midrank among the positives. Both midranks differ only by the negatives before
    the positive's tie group plus half the negatives inside it, so one sort of the pooled scores
    and running counts per class give every component in O(n log n) time and O(n) memory.
    """
    n1, n0 = _check_classes(positive)
    if order is None:
        order = np.argsort(score)
    per_row = _row_placements(positive, score, order, n1, n0)
    return Placements(v10=per_row[positive], v01=per_row[~positive])


def auc(label: object, score: object) -> float:
    """Area under the ROC curve, ties counted one half.

    Parameters
    ----------
    label : array_like
        0/1 labels (or graded relevance: positive where above 0). Both classes must occur.
    score : array_like
        Finite scores, same length; higher means more likely positive.

    Returns
    -------
    float
        ``P(score of a positive > score of a negative) + 0.5 P(tie)``: the Mann–Whitney U of
        the positives divided by ``n1 n0`` [4]; the trapezoidal area under the empirical ROC
        curve, as ``sklearn.metrics.roc_auc_score`` computes it.

    Examples
    --------
    >>> auc([0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8])
    0.75
    """
    positive = binary_labels(label)
    values = finite_1d(score, "score")
    if values.size != positive.size:
        raise ValueError(f"label and score differ in length ({positive.size} vs {values.size})")
    n1, n0 = _check_classes(positive)
    ties = _TieCounts.of(positive, values, np.argsort(values))
    # Mann–Whitney U of the positives, ties one half [4].
    u = float(np.dot(ties.pos_in, ties.neg_before + 0.5 * ties.neg_in))
    return u / (float(n1) * float(n0))


def _components_variance(a: Placements, b: Placements | None) -> float:
    """Var(AUC_a - AUC_b) for paired components, or Var(AUC_a) when *b* is None ([1], eq. 3)."""
    v10 = a.v10 if b is None else a.v10 - b.v10
    v01 = a.v01 if b is None else a.v01 - b.v01
    var10 = float(np.var(v10, ddof=1)) / v10.size if v10.size > 1 else 0.0
    var01 = float(np.var(v01, ddof=1)) / v01.size if v01.size > 1 else 0.0
    return var10 + var01


def _two_sided(z: float) -> float:
    return float(2.0 * sps.norm.sf(abs(z)))


def delong_paired(
    label: object,
    candidate: object,
    baseline: object,
    *,
    positive: np.ndarray | None = None,
    orders: tuple[np.ndarray, np.ndarray] | None = None,
    ties: tuple[bool, bool] | None = None,
) -> AUCChange:
    """DeLong's test for two correlated ROC curves (two scores of the same rows) [1], [2].

    Parameters
    ----------
    label : array_like
        0/1 (or graded: positive above 0) labels of the rows; both classes must occur.
    candidate, baseline : array_like
        Two finite scores of the same rows.
    positive : ndarray of bool, optional
        The binarised labels when the caller has them (then *label* is ignored).
    orders : (ndarray, ndarray), optional
        ``argsort`` of candidate and baseline when the caller has them.
    ties : (bool, bool), optional
        Whether each score has ties, when the caller knows (False skips a check; a subset of
        rows of a score without ties has none either).

    Returns
    -------
    AUCChange
        ``difference = AUC(candidate) - AUC(baseline)``; ``se`` from the covariance of the
        structural components: ``Var = S10 / n1 + S01 / n0`` of the per-row differences, which
        equals ``c' (S10 / n1 + S01 / n0) c`` with ``c = (1, -1)`` in [1].

    Notes
    -----
    O(n log n) time: one sort per score [2]. The normal approximation needs a few dozen rows of
    each class; with fewer, or an AUC near 0 or 1, the standard error is unreliable.
    """
    pos = binary_labels(label) if positive is None else positive
    cand = finite_1d(candidate, "candidate")
    base = finite_1d(baseline, "baseline")
    if not (pos.size == cand.size == base.size):
        raise ValueError(
            f"label, candidate and baseline differ in length ({pos.size}, {cand.size}, {base.size})"
        )
    n1, n0 = _check_classes(pos)
    # The two scores' halves are independent: on two cores they run side by side.
    row_c, row_b = both(
        lambda: _row_placements(
            pos,
            cand,
            np.argsort(cand) if orders is None else orders[0],
            n1,
            n0,
            None if ties is None else ties[0],
        ),
        lambda: _row_placements(
            pos,
            base,
            np.argsort(base) if orders is None else orders[1],
            n1,
            n0,
            None if ties is None else ties[1],
        ),
        rows=cand.size,
    )
    # Class variances of the per-row differences without copying the classes out: DeLong's
    # S10 and S01 with contrast (1, -1), [1] eq. 3. Centred first (two passes) for accuracy.
    weight_pos = pos.astype(np.float64)
    d = row_c - row_b
    sum_pos = float(np.dot(d, weight_pos))
    mean_pos, mean_neg = sum_pos / n1, (float(d.sum()) - sum_pos) / n0
    d -= np.where(pos, mean_pos, mean_neg)
    d *= d
    sq_pos = float(np.dot(d, weight_pos))
    sq_neg = float(d.sum()) - sq_pos
    var10 = sq_pos / (n1 - 1) if n1 > 1 else 0.0
    var01 = sq_neg / (n0 - 1) if n0 > 1 else 0.0
    variance = var10 / n1 + var01 / n0
    auc_c = float(np.dot(row_c, weight_pos)) / n1
    auc_b = float(np.dot(row_b, weight_pos)) / n1
    diff = auc_c - auc_b
    se = math.sqrt(variance)
    pvalue = _two_sided(diff / se) if se > 0 else (1.0 if diff == 0 else 0.0)
    return AUCChange(
        candidate=auc_c,
        baseline=auc_b,
        difference=diff,
        se=se,
        pvalue=pvalue,
        n_positive=n1,
        n_negative=n0,
        method="delong-paired",
    )


def auc_se(label: object, score: object) -> tuple[float, float]:
    """AUC and its DeLong standard error ``sqrt(S10 / n1 + S01 / n0)`` [1]."""
    positive = binary_labels(label)
    values = finite_1d(score, "score")
    p = placements(positive, values)
    variance = _components_variance(p, None)
    return p.auc, math.sqrt(max(variance, 0.0))


def delong_unpaired(
    candidate_label: object,
    candidate_score: object,
    baseline_label: object,
    baseline_score: object,
) -> AUCChange:
    """DeLong's test for the AUCs of two independent samples [1].

    Each AUC gets its own variance ``S10 / n1 + S01 / n0``; the variance of the difference is
    their sum (no covariance: different rows). ``n_positive`` and ``n_negative`` count the
    candidate's rows.
    """
    auc_c, se_c = auc_se(candidate_label, candidate_score)
    auc_b, se_b = auc_se(baseline_label, baseline_score)
    diff = auc_c - auc_b
    se = math.hypot(se_c, se_b)
    pvalue = _two_sided(diff / se) if se > 0 else (1.0 if diff == 0 else 0.0)
    positive = binary_labels(candidate_label)
    return AUCChange(
        candidate=auc_c,
        baseline=auc_b,
        difference=diff,
        se=se,
        pvalue=pvalue,
        n_positive=int(positive.sum()),
        n_negative=int(positive.size - positive.sum()),
        method="delong-unpaired",
    )


def hanley_mcneil_se(area: float, n_positive: int, n_negative: int) -> float:
    """Standard error of an AUC by the formula of Hanley & McNeil [3], Table/eq. 1.

    ``SE² = (A(1-A) + (n1-1)(Q1-A²) + (n0-1)(Q2-A²)) / (n1 n0)`` with ``Q1 = A/(2-A)`` and
    ``Q2 = 2A²/(1+A)``, which assume exponential score distributions. Used for planning (the
    minimum detectable effect before a sample exists); tests from data use DeLong.
    """
    if not 0.0 <= area <= 1.0:
        raise ValueError(f"area must be in [0, 1], got {area!r}")
    if n_positive < 1 or n_negative < 1:
        raise ValueError("n_positive and n_negative must be at least 1")
    q1 = area / (2.0 - area)
    q2 = 2.0 * area * area / (1.0 + area)
    a2 = area * area
    num = area * (1 - area) + (n_positive - 1) * (q1 - a2) + (n_negative - 1) * (q2 - a2)
    return math.sqrt(max(num, 0.0) / (n_positive * n_negative))
