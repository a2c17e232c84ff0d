"""A vectorised, seeded nonparametric bootstrap by resampling weights.

A bootstrap resample of n rows drawn with replacement is the same as giving row i the weight
``w_i`` = how often it was drawn (a multinomial count, summing to n) [1]. Every statistic here
is written for a block of weight rows of shape ``(b, n)`` and returns ``b`` values, so a whole
block of resamples is one numpy computation. Blocks are cut to at most :data:`MAX_CELLS`
weights, so memory stays bounded (about 32 MB per block) whatever n is.

Paired samples (candidate and baseline scores of the same rows) use one weight row for both,
which keeps the pairing; independent samples draw weights for each sample separately [1].

References
----------
1. Efron, B. & Tibshirani, R. J. (1993). An Introduction to the Bootstrap. Chapman & Hall,
   chapters 6 and 13.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

import numpy as np

#: Largest number of weights (resamples x rows) held at once.
MAX_CELLS = 4_000_000

Statistic = Callable[[np.ndarray], np.ndarray]


def check_resamples(resamples: int) -> int:
    if not isinstance(resamples, int) or not 10 <= resamples <= 100_000:
        raise ValueError(f"resamples must be an integer from 10 to 100000, got {resamples!r}")
    return resamples


def weight_blocks(
    n: int, resamples: int, rng: np.random.Generator, *, max_cells: int = MAX_CELLS
) -> Iterator[np.ndarray]:
    """Yield blocks of multinomial resampling weights, shape ``(b, n)``, float64.

    Each row counts how often each of the n rows was drawn in n draws with replacement.
    """
    if n < 1:
        raise ValueError(f"n must be at least 1, got {n}")
    check_resamples(resamples)
    per_block = max(1, max_cells // n)
    done = 0
    while done < resamples:
        b = min(per_block, resamples - done)
        draws = rng.integers(0, n, size=(b, n), dtype=np.int64)
        draws += (np.arange(b, dtype=np.int64) * n)[:, None]
        counts = np.bincount(draws.ravel(), minlength=b * n).reshape(b, n)
        done += b
        yield counts.astype(np.float64)


def paired_replicates(
    statistic: Statistic, n: int, *, resamples: int, rng: np.random.Generator
) -> np.ndarray:
    """Bootstrap replicates of a paired statistic: one weight row per resample for both sides.

    *statistic* maps weights ``(b, n)`` to the change (candidate minus baseline), ``(b,)``.
    """
    out = [np.asarray(statistic(w), dtype=np.float64) for w in weight_blocks(n, resamples, rng)]
    return np.concatenate(out)


def unpaired_replicates(
    candidate: Statistic,
    n_candidate: int,
    baseline: Statistic,
    n_baseline: int,
    *,
    resamples: int,
    rng: np.random.Generator,
) -> np.ndarray:
    """Replicates of ``candidate(w_c) - baseline(w_b)`` with independent weights per sample."""
    cand = np.concatenate(
        [
            np.asarray(candidate(w), dtype=np.float64)
            for w in weight_blocks(n_candidate, resamples, rng)
        ]
    )
    base = np.concatenate(
        [
            np.asarray(baseline(w), dtype=np.float64)
            for w in weight_blocks(n_baseline, resamples, rng)
        ]
    )
    return np.asarray(cand - base, dtype=np.float64)


# Weighted statistics: each maps weights (b, n) to (b,) values.


def weighted_mean(values: np.ndarray) -> Statistic:
    """``w -> sum(w x) / sum(w)`` for fixed per-row values x (log loss terms, Brier terms)."""

    def stat(w: np.ndarray) -> np.ndarray:
        return np.asarray((w @ values) / w.sum(axis=1), dtype=np.float64)

    return stat


def weighted_ratio(numerator: np.ndarray, denominator: np.ndarray) -> Statistic:
    """``w -> sum(w a) / sum(w b)`` (the calibration ratio: predictions over outcomes)."""

    def stat(w: np.ndarray) -> np.ndarray:
        den = w @ denominator
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(den > 0, (w @ numerator) / np.where(den > 0, den, 1.0), np.inf)

    return stat


def weighted_binned_abs_sum(gap: np.ndarray, bin_index: np.ndarray, n_bins: int) -> Statistic:
    """``w -> sum_b |sum_{i in b} w_i gap_i| / sum(w)`` with fixed bins (ECE)."""
    order = np.argsort(bin_index, kind="stable")
    starts = np.searchsorted(bin_index[order], np.arange(n_bins))
    sorted_gap = gap[order]

    def stat(w: np.ndarray) -> np.ndarray:
        sums = np.add.reduceat(w[:, order] * sorted_gap, starts, axis=1)
        return np.asarray(np.abs(sums).sum(axis=1) / w.sum(axis=1), dtype=np.float64)

    return stat


def weighted_auc(positive: np.ndarray, score: np.ndarray) -> Statistic:
    """``w -> AUC`` of the weighted sample, ties one half, from a single sort of *score*.

    With the tie groups of the sorted scores fixed, the weighted Mann–Whitney count is
    ``sum_g P_g (N_before_g + N_g / 2)`` over groups g, with P_g and N_g the positive and
    negative weight in group g; divided by ``sum P * sum N``.
    """
    order = np.argsort(score)
    s = score[order]
    pos = positive[order]
    new = np.empty(s.size, dtype=bool)
    new[0] = True
    np.not_equal(s[1:], s[:-1], out=new[1:])
    starts = np.flatnonzero(new)
    pos_f = pos.astype(np.float64)
    neg_f = 1.0 - pos_f

    def stat(w: np.ndarray) -> np.ndarray:
        ws = w[:, order]
        p_g = np.add.reduceat(ws * pos_f, starts, axis=1)
        n_g = np.add.reduceat(ws * neg_f, starts, axis=1)
        n_before = np.cumsum(n_g, axis=1) - n_g
        u = np.sum(p_g * (n_before + 0.5 * n_g), axis=1)
        total = p_g.sum(axis=1) * n_g.sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(total > 0, u / np.where(total > 0, total, 1.0), np.nan)

    return stat


def difference(candidate: Statistic, baseline: Statistic) -> Statistic:
    """``w -> candidate(w) - baseline(w)``: a paired change under one weight row."""

    def stat(w: np.ndarray) -> np.ndarray:
        return candidate(w) - baseline(w)

    return stat
