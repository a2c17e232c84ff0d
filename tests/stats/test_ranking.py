"""Ranking metrics per group against scikit-learn and direct per-group definitions."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import ndcg_score

from service.stats.ranking import GroupedLabels


def grouped(
    seed: int, groups: int = 300, size: int = 12
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    label = rng.integers(0, 4, (groups, size)).astype(float)
    label[label < 2] = 0.0  # graded relevance 0, 2, 3
    score = rng.random((groups, size))
    return label, score, np.repeat(np.arange(groups), size)


def flat(
    label: np.ndarray, score: np.ndarray, codes: np.ndarray, seed: int
) -> tuple[GroupedLabels, np.ndarray]:
    perm = np.random.default_rng(seed).permutation(codes.size)  # rows need not be grouped
    prepared = GroupedLabels.of(codes[perm], int(codes.max()) + 1, label.ravel()[perm])
    return prepared, score.ravel()[perm]


@pytest.mark.parametrize("k", [1, 3, 5, 12])
def test_ndcg_matches_sklearn(k: int) -> None:
    label, score, codes = grouped(1)
    keep = label.sum(axis=1) > 0
    prepared, s = flat(label, score, codes, 2)
    ours = prepared.per_group("ndcg", s, k=k)
    # scikit-learn ndcg_score (linear gain, log2 discount); groups without a relevant row left
    # out on both sides; continuous scores have no ties.
    assert ours.mean == pytest.approx(ndcg_score(label[keep], score[keep], k=k), rel=1e-12)
    assert ours.n_without_relevant == int((~keep).sum())


def test_ndcg_exponential_gain_by_direct_definition() -> None:
    # Burges et al. (2005), ICML: gain 2^rel - 1, discount 1 / log2(place + 1).
    label, score, codes = grouped(3, groups=50, size=8)
    prepared, s = flat(label, score, codes, 4)
    k = 5
    direct = []
    for g in range(label.shape[0]):
        if label[g].sum() == 0:
            continue
        ranked = label[g][np.argsort(-score[g])][:k]
        ideal = np.sort(label[g])[::-1][:k]
        disc = 1 / np.log2(np.arange(2, ranked.size + 2))
        direct.append(((2**ranked - 1) * disc).sum() / ((2**ideal - 1) * disc).sum())
    ours = prepared.per_group("ndcg", s, k=k, gain="exponential")
    assert ours.mean == pytest.approx(np.mean(direct), rel=1e-12)


@pytest.mark.parametrize("k", [1, 4, 12])
def test_recall_mrr_hit_rate_by_direct_definition(k: int) -> None:
    label, score, codes = grouped(5)
    prepared, s = flat(label, score, codes, 6)
    recall, rr, hit = [], [], []
    for g in range(label.shape[0]):
        relevant = label[g] > 0
        if not relevant.any():
            continue
        top = relevant[np.argsort(-score[g])][:k]
        recall.append(top.sum() / relevant.sum())
        hit.append(float(top.any()))
        rr.append(1.0 / (np.argmax(top) + 1) if top.any() else 0.0)
    assert prepared.per_group("recall", s, k=k).mean == pytest.approx(np.mean(recall), rel=1e-12)
    assert prepared.per_group("mrr", s, k=k).mean == pytest.approx(np.mean(rr), rel=1e-12)
    assert prepared.per_group("hit_rate", s, k=k).mean == pytest.approx(np.mean(hit), rel=1e-12)


def test_ties_are_ordered_pessimistically() -> None:
    # One group, all scores tied, one relevant row of four: the relevant row goes last.
    prepared = GroupedLabels.of(np.zeros(4, dtype=np.int64), 1, [0.0, 1.0, 0.0, 0.0])
    tied = np.full(4, 0.5)
    assert prepared.per_group("mrr", tied, k=4).mean == pytest.approx(0.25)
    assert prepared.per_group("hit_rate", tied, k=3).mean == 0.0
    # DCG of place 4: 1 / log2(5); ideal: 1 / log2(2) = 1.
    assert prepared.per_group("ndcg", tied, k=4).mean == pytest.approx(1 / np.log2(5))


def test_validation_messages() -> None:
    prepared = GroupedLabels.of(np.zeros(2, dtype=np.int64), 1, [0.0, 1.0])
    with pytest.raises(ValueError, match="k must be a positive integer"):
        prepared.per_group("ndcg", [0.1, 0.2], k=0)
    with pytest.raises(ValueError, match="metric must be one of"):
        prepared.per_group("map", [0.1, 0.2], k=1)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="label must be non-negative"):
        GroupedLabels.of(np.zeros(2, dtype=np.int64), 1, [0.0, -1.0])
    none_relevant = GroupedLabels.of(np.zeros(2, dtype=np.int64), 1, [0.0, 0.0])
    with pytest.raises(ValueError, match="no group has a relevant row"):
        _ = none_relevant.per_group("recall", [0.1, 0.2], k=1).mean
