"""Ranking quality per group (request, user) from graded labels.

Functions
---------
GroupedLabels.of
    Prepare the groups and labels of a sample once (ideal DCG, relevant counts).
GroupedLabels.per_group
    NDCG@k, recall@k, MRR@k or hit rate@k for every group, for one score.

Rows of a group are ranked by score, highest first. **Ties in score are ordered with the lower
label first** (the pessimistic order), so a model gains nothing from tied scores and a collapsed
model that scores every row alike gets the worst ranking its ties allow. Groups without any
relevant row (label above 0) have no recall, MRR or NDCG; they are left out and counted.

Definitions (``rel`` the label, ``pos`` the 1-based place in the group's ranking):

- ``DCG@k = sum_{pos <= k} gain(rel) / log2(pos + 1)`` with ``gain(rel) = rel`` (linear, [1])
  or ``2^rel - 1`` (exponential, [2]); ``NDCG@k = DCG@k / ideal DCG@k`` [1].
- ``recall@k`` = relevant rows in the top k / relevant rows in the group.
- ``MRR@k`` = 1 / place of the first relevant row, 0 when none is in the top k [3].
- ``hit rate@k`` = 1 when any relevant row is in the top k, else 0.

References
----------
1. Järvelin, K. & Kekäläinen, J. (2002). Cumulated gain-based evaluation of IR techniques.
   ACM Transactions on Information Systems 20(4), 422–446.
2. Burges, C. et al. (2005). Learning to rank using gradient descent. ICML 2005, 89–96.
3. Voorhees, E. M. (1999). The TREC-8 question answering track report. TREC-8, 77–82.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from service.stats.validation import finite_1d

RankingMetric = Literal["ndcg", "recall", "mrr", "hit_rate"]
RANKING_METRICS: tuple[RankingMetric, ...] = ("ndcg", "recall", "mrr", "hit_rate")
Gain = Literal["linear", "exponential"]


@dataclass(frozen=True)
class PerGroup:
    """Per-group values of a ranking metric; ``groups`` are the codes of the groups kept."""

    metric: str
    k: int
    groups: np.ndarray
    values: np.ndarray
    #: Groups left out because they have no relevant row.
    n_without_relevant: int

    @property
    def mean(self) -> float:
        if self.values.size == 0:
            raise ValueError("no group has a relevant row: the ranking metric is undefined")
        return float(self.values.mean())


def _gain(rel: np.ndarray, gain: Gain) -> np.ndarray:
    return rel if gain == "linear" else np.exp2(rel) - 1.0


def dense_rank(values: np.ndarray, descending: bool) -> tuple[np.ndarray, int]:
    """Dense rank of *values* (0 for the first), ties sharing a rank; and the number of ranks."""
    order = np.argsort(values)
    if descending:
        order = order[::-1]
    ordered = values[order]
    new = np.empty(values.size, dtype=bool)
    new[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=new[1:])
    ranks = np.empty(values.size, dtype=np.int64)
    ranks[order] = np.cumsum(new) - 1
    return ranks, int(new.sum())


@dataclass(frozen=True)
class GroupedLabels:
    """The groups and labels of one sample, prepared for ranking metrics.

    Build with :meth:`of`; then :meth:`per_group` for each score (candidate, baseline).
    """

    codes: np.ndarray
    n_groups: int
    label: np.ndarray
    label_rank: np.ndarray
    n_label_ranks: int
    start: np.ndarray
    relevant: np.ndarray
    #: ideal_sorted[j] is the label at sorted place j when every group is ideally ranked.
    ideal_sorted: np.ndarray

    @classmethod
    def of(cls, codes: np.ndarray, n_groups: int, label: object) -> GroupedLabels:
        """Prepare groups *codes* (0 .. n_groups - 1 per row) and graded *label* (>= 0)."""
        rel = finite_1d(label, "label")
        if rel.size != codes.size:
            raise ValueError(f"label and group differ in length ({rel.size} vs {codes.size})")
        if rel.size == 0:
            raise ValueError("ranking metrics need at least one row")
        if rel.min() < 0:
            raise ValueError("label must be non-negative (graded relevance)")
        label_rank, n_ranks = dense_rank(rel, descending=False)
        size = np.bincount(codes, minlength=n_groups)
        start = np.cumsum(size) - size
        relevant = np.bincount(codes, weights=(rel > 0).astype(np.float64), minlength=n_groups)
        # Ideal order: by group, label descending.
        ideal = np.argsort(codes * n_ranks + (n_ranks - 1 - label_rank))
        return cls(
            codes=codes,
            n_groups=n_groups,
            label=rel,
            label_rank=label_rank,
            n_label_ranks=n_ranks,
            start=start,
            relevant=relevant,
            ideal_sorted=rel[ideal],
        )

    def order(self, score: np.ndarray) -> np.ndarray:
        """Rows sorted by group, score descending, then label ascending (pessimistic ties)."""
        score_rank, n_scores = dense_rank(score, descending=True)
        if self.n_groups * n_scores * self.n_label_ranks < 2**62:
            key = (self.codes * n_scores + score_rank) * self.n_label_ranks + self.label_rank
            return np.argsort(key)
        return np.lexsort((self.label_rank, score_rank, self.codes))

    def per_group(
        self, metric: RankingMetric, score: object, *, k: int, gain: Gain = "linear"
    ) -> PerGroup:
        """Per-group *metric* at cut-off *k* for *score* (see the module docstring)."""
        if metric not in RANKING_METRICS:
            raise ValueError(f"metric must be one of {', '.join(RANKING_METRICS)}, got {metric!r}")
        if not isinstance(k, int) or k < 1:
            raise ValueError(f"k must be a positive integer, got {k!r}")
        if gain not in ("linear", "exponential"):
            raise ValueError(f"gain must be 'linear' or 'exponential', got {gain!r}")
        values = finite_1d(score, "score")
        if values.size != self.codes.size:
            raise ValueError(
                f"score and group differ in length ({values.size} vs {self.codes.size})"
            )
        order = self.order(values)
        g = self.codes[order]
        place = np.arange(g.size, dtype=np.int64) - self.start[g]  # 0-based place in group
        top = place < k
        rel = self.label[order]
        has_relevant = self.relevant > 0
        if metric == "ndcg":
            discount = 1.0 / np.log2(place[top] + 2.0)
            dcg = np.bincount(
                g[top], weights=_gain(rel[top], gain) * discount, minlength=self.n_groups
            )
            ideal = np.bincount(
                g[top],
                weights=_gain(self.ideal_sorted[top], gain) * discount,
                minlength=self.n_groups,
            )
            keep = ideal > 0
            per = dcg[keep] / ideal[keep]
        else:
            hit = top & (rel > 0)
            keep = has_relevant
            if metric == "recall":
                hits = np.bincount(g[hit], minlength=self.n_groups)
                per = hits[keep] / self.relevant[keep]
            elif metric == "hit_rate":
                hits = np.bincount(g[hit], minlength=self.n_groups)
                per = (hits[keep] > 0).astype(np.float64)
            else:  # mrr: first relevant row in the top k of each group (rows are in place order)
                rows = np.flatnonzero(hit)
                first = np.ones(rows.size, dtype=bool)
                first[1:] = g[rows[1:]] != g[rows[:-1]]
                reciprocal = np.zeros(self.n_groups)
                reciprocal[g[rows[first]]] = 1.0 / (place[rows[first]] + 1.0)
                per = reciprocal[keep]
        groups = np.flatnonzero(keep)
        return PerGroup(
            metric=metric,
            k=k,
            groups=groups,
            values=per.astype(np.float64),
            n_without_relevant=int(self.n_groups - groups.size),
        )
