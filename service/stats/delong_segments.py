"""DeLong's paired test in every value of a segment column at once.

:func:`delong_paired_by_value` gives the same numbers as :func:`service.stats.auc.delong_paired`
run on the rows of each value separately, but from the one sort of each score over all rows:
the sorted rows are regrouped by value with a stable (linear-time) sort of the small integer
codes, each value's rows stay in score order, and the placement values of Sun & Xu [2] are
counted within each value's block. Every row belongs to exactly one value, so one pass per score
serves all values, and the per-value variances of DeLong [1] come from weighted counts by
(value, class).

References
----------
1. DeLong, E. R., DeLong, D. M. & Clarke-Pearson, D. L. (1988). Biometrics 44(3), 837–845.
2. Sun, X. & Xu, W. (2014). IEEE Signal Processing Letters 21(11), 1389–1393.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats as sps

from service.stats.auc import AUCChange, sorted_placements
from service.stats.parallel import both

#: Up to this many values, one selection per value regroups the rows faster than a sort.
FEW_VALUES = 16


def _grouped(order: np.ndarray, small: np.ndarray, n_values: int) -> np.ndarray:
    """*order* regrouped by value, each value's rows kept in score order: the stable sort of
    the rows' values in score order, done as one selection per value when they are few."""
    in_order = small[order]
    if n_values <= FEW_VALUES:
        return np.concatenate([order[in_order == v] for v in range(n_values)])
    return order[np.argsort(in_order, kind="stable")]


def _grouped_placements(
    positive: np.ndarray,
    score: np.ndarray,
    order: np.ndarray,
    small: np.ndarray,
    n1: np.ndarray,
    n0: np.ndarray,
    ties: bool,
) -> np.ndarray:
    """Per-row placement values within each row's own value (see module docstring)."""
    grouped = _grouped(order, small, n1.size)
    pos = positive[grouped]
    s = score[grouped] if ties else None
    counts = np.bincount(small, minlength=n1.size)
    values = np.zeros(score.size, dtype=np.float64)
    start = 0
    for v, count in enumerate(counts.tolist()):
        end = start + count
        if n1[v] > 0 and n0[v] > 0:
            values[start:end] = sorted_placements(
                pos[start:end], int(n1[v]), int(n0[v]), None if s is None else s[start:end]
            )
        start = end
    per_row = np.empty(score.size, dtype=np.float64)
    per_row[grouped] = values
    return per_row


def delong_paired_by_value(
    positive: np.ndarray,
    candidate: np.ndarray,
    baseline: np.ndarray,
    orders: tuple[np.ndarray, np.ndarray],
    codes: np.ndarray,
    n_values: int,
    *,
    ties: tuple[bool, bool] = (True, True),
) -> list[AUCChange | str]:
    """DeLong's paired test for each value of *codes* (0 .. n_values - 1).

    Parameters
    ----------
    positive : ndarray of bool
        Binarised labels of all rows.
    candidate, baseline : ndarray of float64
        Finite scores of all rows.
    orders : (ndarray, ndarray)
        ``argsort`` of each score over all rows.
    codes : ndarray of int
        Each row's value.
    n_values : int
        Number of values.
    ties : (bool, bool)
        Whether each score may have ties (False skips the tie handling; exact only when the
        score has no two equal values).

    Returns
    -------
    list
        Per value, an :class:`AUCChange` (``method = "delong-paired"``) or, when the value's
        rows lack a class, a message saying so.
    """
    n1 = np.bincount(codes, weights=positive.astype(np.float64), minlength=n_values)
    total = np.bincount(codes, minlength=n_values).astype(np.float64)
    n0 = total - n1
    safe1 = np.maximum(n1, 1.0)
    small = codes.astype(np.int16 if n_values < 32_000 else np.int32)
    row_c, row_b = both(
        lambda: _grouped_placements(positive, candidate, orders[0], small, n1, n0, ties[0]),
        lambda: _grouped_placements(positive, baseline, orders[1], small, n1, n0, ties[1]),
        rows=codes.size,
    )
    # Per (value, class): sums of the components and of the centred squared differences.
    key = codes * 2 + positive.astype(np.int64)
    cells = 2 * n_values
    size = np.bincount(key, minlength=cells).astype(np.float64)
    d = row_c - row_b
    mean = np.bincount(key, weights=d, minlength=cells) / np.maximum(size, 1.0)
    d -= mean[key]
    sq = np.bincount(key, weights=d * d, minlength=cells)
    auc_c = np.bincount(key, weights=row_c, minlength=cells)[1::2] / safe1
    auc_b = np.bincount(key, weights=row_b, minlength=cells)[1::2] / safe1
    out: list[AUCChange | str] = []
    for v in range(n_values):
        m, k = int(n1[v]), int(n0[v])
        if m == 0 or k == 0:
            out.append(f"needs both classes for an AUC, got {m} positive and {k} negative rows")
            continue
        var10 = sq[2 * v + 1] / (m - 1) if m > 1 else 0.0
        var01 = sq[2 * v] / (k - 1) if k > 1 else 0.0
        se = math.sqrt(max(var10 / m + var01 / k, 0.0))
        diff = float(auc_c[v] - auc_b[v])
        if se > 0:
            pvalue = float(2.0 * sps.norm.sf(abs(diff) / se))
        else:
            pvalue = 1.0 if diff == 0 else 0.0
        out.append(
            AUCChange(
                candidate=float(auc_c[v]),
                baseline=float(auc_b[v]),
                difference=diff,
                se=se,
                pvalue=pvalue,
                n_positive=m,
                n_negative=k,
                method="delong-paired",
            )
        )
    return out
