"""Paired change: how differently do two models score the same rows?

Functions
---------
midranks
    Ranks with ties given the mean of their places.
mean_abs_change
    Mean of ``|candidate - baseline|`` with a t interval.
spearman
    Spearman's rank correlation [1] with a Fisher-z interval, Bonett–Wright variance [2].
threshold_churn
    Share of rows whose decision ``score >= threshold`` differs between the two scores [3],
    with a Wilson interval [4].
top_k_churn
    Share of each group's top-k places taken by rows the baseline did not put in its top k [3].

References
----------
1. Spearman, C. (1904). The proof and measurement of association between two things. American
   Journal of Psychology 15(1), 72–101.
2. Bonett, D. G. & Wright, T. A. (2000). Sample size requirements for estimating Pearson,
   Kendall and Spearman correlations. Psychometrika 65(1), 23–28.
3. Cormier, Q., Milani Fard, M., Canini, K. & Gupta, M. (2016). Launch and iterate: reducing
   prediction churn. NIPS 2016.
4. Wilson, E. B. (1927). Probable inference, the law of succession, and statistical inference.
   Journal of the American Statistical Association 22(158), 209–212.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats as sps

from service.stats.ranking import dense_rank
from service.stats.validation import finite_1d


@dataclass(frozen=True)
class AgreementResult:
    statistic: float
    interval: tuple[float, float]
    n: int


def _pair(candidate: object, baseline: object, min_size: int = 1) -> tuple[np.ndarray, np.ndarray]:
    c = finite_1d(candidate, "candidate", min_size=min_size)
    b = finite_1d(baseline, "baseline", min_size=min_size)
    if c.size != b.size:
        raise ValueError(f"candidate and baseline differ in length ({c.size} vs {b.size})")
    return c, b


def _z(confidence: float) -> float:
    if not 0.5 <= confidence < 1.0:
        raise ValueError(f"confidence must be in [0.5, 1), got {confidence!r}")
    return float(sps.norm.ppf(0.5 + confidence / 2.0))


def midranks(values: np.ndarray, *, order: np.ndarray | None = None) -> np.ndarray:
    """1-based ranks; tied values share the mean of their places (``scipy.stats.rankdata``).

    *order* is ``np.argsort(values)`` when the caller has it.
    """
    n = values.size
    if order is None:
        order = np.argsort(values)
    s = values[order]
    new = np.empty(n, dtype=bool)
    new[0] = True
    np.not_equal(s[1:], s[:-1], out=new[1:])
    ranks = np.empty(n, dtype=np.float64)
    starts = np.flatnonzero(new)
    if starts.size == n:
        ranks[order] = np.arange(1, n + 1, dtype=np.float64)
        return ranks
    ends = np.append(starts[1:], n)
    mean_place = (starts + 1 + ends) / 2.0
    ranks[order] = np.repeat(mean_place, ends - starts)
    return ranks


def mean_abs_change(
    candidate: object, baseline: object, *, confidence: float = 0.95
) -> AgreementResult:
    """Mean absolute difference of two scores of the same rows, with a t interval."""
    c, b = _pair(candidate, baseline, min_size=2)
    d = np.abs(c - b)
    _z(confidence)  # validates
    q = float(sps.t.ppf(0.5 + confidence / 2.0, d.size - 1))
    se = float(np.std(d, ddof=1)) / math.sqrt(d.size)
    mean = float(d.mean())
    return AgreementResult(
        statistic=mean, interval=(max(0.0, mean - q * se), mean + q * se), n=d.size
    )


def spearman(
    candidate: object,
    baseline: object,
    *,
    confidence: float = 0.95,
    orders: tuple[np.ndarray, np.ndarray] | None = None,
) -> AgreementResult:
    """Spearman's rank correlation of two scores of the same rows [1].

    Pearson correlation of the midranks (equal to ``scipy.stats.spearmanr``). The interval is
    ``tanh(atanh(r) ± z sqrt((1 + r²/2) / (n - 3)))`` [2]; needs n >= 4. A constant score has
    no rank correlation: ValueError. *orders* are the two ``argsort`` when the caller has them.
    """
    c, b = _pair(candidate, baseline, min_size=4)
    z = _z(confidence)
    rc = midranks(c, order=None if orders is None else orders[0])
    rb = midranks(b, order=None if orders is None else orders[1])
    rc -= rc.mean()
    rb -= rb.mean()
    denom = math.sqrt(float(np.dot(rc, rc)) * float(np.dot(rb, rb)))
    if denom == 0:
        raise ValueError("a constant score has no rank correlation")
    r = float(np.clip(np.dot(rc, rb) / denom, -1.0, 1.0))
    n = c.size
    if abs(r) < 1.0:
        half = z * math.sqrt((1.0 + r * r / 2.0) / (n - 3))
        low, high = math.tanh(math.atanh(r) - half), math.tanh(math.atanh(r) + half)
    else:
        low = high = r
    return AgreementResult(statistic=r, interval=(low, high), n=n)


def wilson_interval(successes: int, n: int, confidence: float) -> tuple[float, float]:
    """Wilson's score interval for a proportion [4]."""
    z = _z(confidence)
    if n == 0:
        return (0.0, 1.0)
    p = successes / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    return (max(0.0, centre - half), min(1.0, centre + half))


def threshold_churn(
    candidate: object, baseline: object, *, threshold: float, confidence: float = 0.95
) -> AgreementResult:
    """Share of rows where ``score >= threshold`` differs between the two scores [3]."""
    if not math.isfinite(threshold):
        raise ValueError(f"threshold must be finite, got {threshold!r}")
    c, b = _pair(candidate, baseline)
    flips = int(np.count_nonzero((c >= threshold) != (b >= threshold)))
    return AgreementResult(
        statistic=flips / c.size, interval=wilson_interval(flips, c.size, confidence), n=c.size
    )


def top_k_mask(codes: np.ndarray, score: np.ndarray, k: int) -> np.ndarray:
    """True for rows among the k highest scores of their group; ties by row order."""
    n = score.size
    rank, n_ranks = dense_rank(score, descending=True)
    rows = np.arange(n, dtype=np.int64)
    if int(codes.max(initial=0) + 1) * n_ranks * n < 2**62:
        order = np.argsort((codes.astype(np.int64) * n_ranks + rank) * n + rows)
    else:
        order = np.lexsort((rows, rank, codes))
    g = codes[order]
    size = np.bincount(codes)
    start = np.cumsum(size) - size
    mask = np.empty(n, dtype=bool)
    mask[order] = (rows - start[g]) < k
    return mask


def top_k_churn(
    codes: np.ndarray, candidate: object, baseline: object, *, k: int, confidence: float = 0.95
) -> AgreementResult:
    """Share of top-k places (over all groups) the candidate gives to rows outside the
    baseline's top k [3]. Each group contributes ``min(k, group size)`` places; ``n`` is their
    total. Ties in score are ordered by row position, the same for both scores.
    """
    if not isinstance(k, int) or k < 1:
        raise ValueError(f"k must be a positive integer, got {k!r}")
    c, b = _pair(candidate, baseline)
    if codes.size != c.size:
        raise ValueError(f"group and score differ in length ({codes.size} vs {c.size})")
    top_c = top_k_mask(codes, c, k)
    top_b = top_k_mask(codes, b, k)
    places = int(top_c.sum())
    moved = int(np.count_nonzero(top_c & ~top_b))
    return AgreementResult(
        statistic=moved / places, interval=wilson_interval(moved, places, confidence), n=places
    )
