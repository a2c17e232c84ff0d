"""Recommendation lists: what a model would show, measured over many groups (requests).

A *list* is one group's top-k items in rank order. From the lists of one snapshot:

- catalog coverage: distinct items shown over the catalog size;
- exposure: how many lists show each item; its Gini coefficient measures how unequally the
  catalog is shown (0: every item equally, ``(n - 1) / n``: one item of n takes everything);
- mean popularity of the items shown, given each item's popularity.

Between two snapshots' lists for the same group: Jaccard similarity of the item sets and
rank-biased overlap (RBO), which weighs agreement at the top of the lists more.

References
----------
1. Gini, C. (1912). Variabilità e mutabilità. Bologna: Tipografia di Paolo Cuppini. (The mean
   difference; the coefficient is half the relative mean absolute difference.)
2. Lorenz, M. O. (1905). Methods of measuring the concentration of wealth. Publications of the
   American Statistical Association 9(70), 209–219. (Gini = 1 - 2 * area under the Lorenz curve.)
3. Webber, W., Moffat, A. and Zobel, J. (2010). A similarity measure for indefinite rankings.
   ACM Transactions on Information Systems 28(4), article 20. (Rank-biased overlap: eq. 7 the
   definition, eq. 21 the weight of a prefix, eq. 30 and 32 the extrapolated point estimate.)
4. Jaccard, P. (1912). The distribution of the flora in the alpine zone. New Phytologist 11(2),
   37–50.
5. Abdollahpouri, H., Burke, R. and Mobasher, B. (2019). Managing popularity bias in
   recommender systems with personalized re-ranking. FLAIRS-32. (Average popularity of
   recommended items as a measure of popularity bias.)
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from service.stats.validation import finite_1d

Lists = Mapping[str, tuple[str, ...]]


@dataclass(frozen=True)
class ListSummary:
    """Measures of one snapshot's lists.

    ``catalog_size`` is the size the coverage and the Gini were computed over (items of the
    catalog that no list shows count as zero exposure).
    """

    groups: int
    slots: int
    distinct_items: int
    catalog_size: int
    coverage: float
    gini: float


@dataclass(frozen=True)
class OverlapSummary:
    """Per-group overlap of two snapshots' lists, over the groups both carry."""

    groups: int
    mean: float
    quantiles: tuple[float, float, float]  # 10 %, 50 %, 90 %
    per_group: Mapping[str, float]


def ranked_lists(
    group: object, item: object, rank: object, *, k: int
) -> dict[str, tuple[str, ...]]:
    """Build each group's list of at most *k* items from columns of a sample.

    Parameters
    ----------
    group, item : sequence of str
        Group (request) and item of each row.
    rank : array_like of float
        Position of the item in its group's list, 1 is the top. Rows with a non-finite rank or
        a rank above *k* are left out.
    k : int
        Cut-off, at least 1.

    Returns
    -------
    dict
        Group -> items in rank order (ties keep the sample's row order). An item repeated in a
        group keeps its best position only.
    """
    if not isinstance(k, int) or k < 1:
        raise ValueError(f"k must be a positive integer, got {k!r}")
    ranks = np.asarray(rank, dtype=np.float64)
    groups = np.asarray(group, dtype=object)
    items = np.asarray(item, dtype=object)
    if not (ranks.ndim == groups.ndim == items.ndim == 1):
        raise ValueError("group, item and rank must be one-dimensional")
    if not (ranks.size == groups.size == items.size):
        raise ValueError(
            f"group, item and rank differ in length ({groups.size}, {items.size}, {ranks.size})"
        )
    keep = np.isfinite(ranks) & (ranks <= k)
    index = np.flatnonzero(keep)
    if index.size == 0:
        return {}
    group_keys = groups[index].astype(str)
    # Sort by group, then rank, then row order (lexsort sorts by the last key first).
    order = index[np.lexsort((index, ranks[index], group_keys))]
    lists: dict[str, list[str]] = {}
    seen: dict[str, set[str]] = {}
    for row in order:
        g = str(groups[row])
        it = str(items[row])
        chosen = lists.setdefault(g, [])
        if it in seen.setdefault(g, set()) or len(chosen) >= k:
            continue
        seen[g].add(it)
        chosen.append(it)
    return {g: tuple(items_) for g, items_ in lists.items()}


def exposure(lists: Lists) -> Counter[str]:
    """How many lists show each item."""
    counts: Counter[str] = Counter()
    for items in lists.values():
        counts.update(items)
    return counts


def gini(values: object) -> float:
    """Gini coefficient of non-negative *values* [1, 2].

    Parameters
    ----------
    values : array_like
        Non-negative finite values (exposure counts, incomes), at least one, not all zero.

    Returns
    -------
    float
        ``sum_i sum_j |x_i - x_j| / (2 n^2 mean(x))``, computed on the sorted values as
        ``sum_i (2 i - n - 1) x_(i) / (n sum x)``. 0 when all values are equal,
        ``(n - 1) / n`` when one value holds everything.

    Notes
    -----
    This is the plain (population) coefficient, without the ``n / (n - 1)`` small-sample
    correction, so that it equals one minus twice the area under the empirical Lorenz curve
    [2]. Zeros count: pass every catalog item, shown or not.

    Examples
    --------
    >>> gini([1, 1, 1, 1])
    0.0
    >>> gini([0, 0, 0, 5])
    0.75
    """
    x = np.sort(finite_1d(values, "values"))
    if np.any(x < 0):
        raise ValueError("values must be non-negative")
    total = float(x.sum())
    if total <= 0:
        raise ValueError("values must not all be zero (the Gini coefficient is undefined)")
    n = x.size
    weights = 2.0 * np.arange(1, n + 1) - n - 1.0
    return float(np.dot(weights, x) / (n * total))


def summarise_lists(lists: Lists, *, catalog_size: int | None = None) -> ListSummary:
    """Coverage and exposure Gini of one snapshot's *lists*.

    Parameters
    ----------
    lists : mapping
        Group -> items, as from :func:`ranked_lists`; at least one non-empty list.
    catalog_size : int, optional
        Number of items that could be shown. Omitted: the distinct items shown (coverage 1).
        Smaller than the distinct items shown is an error.

    Returns
    -------
    ListSummary
        ``coverage = distinct_items / catalog_size``; ``gini`` of the exposure counts over the
        whole catalog, unshown items as zeros.
    """
    counts = exposure(lists)
    distinct = len(counts)
    if distinct == 0:
        raise ValueError("lists must show at least one item")
    size = distinct if catalog_size is None else int(catalog_size)
    if size < distinct:
        raise ValueError(
            f"catalog_size {catalog_size} is smaller than the {distinct} distinct items shown"
        )
    shown = np.fromiter(counts.values(), dtype=np.float64, count=distinct)
    padded = np.concatenate([shown, np.zeros(size - distinct)])
    return ListSummary(
        groups=len(lists),
        slots=int(shown.sum()),
        distinct_items=distinct,
        catalog_size=size,
        coverage=distinct / size,
        gini=gini(padded),
    )


def list_share_popularity(lists: Lists) -> dict[str, float]:
    """Each item's popularity as the share of *lists* that show it (0 to 1)."""
    if not lists:
        raise ValueError("lists must not be empty")
    n = len(lists)
    return {item: count / n for item, count in exposure(lists).items()}


def mean_popularity(lists: Lists, popularity: Mapping[str, float]) -> float:
    """Mean popularity of the items shown, over every (group, item) slot [5].

    Parameters
    ----------
    lists : mapping
        Group -> items; at least one item shown.
    popularity : mapping
        Item -> popularity (counts or shares, non-negative). Items absent count as 0.

    Returns
    -------
    float
        ``sum over slots of popularity[item] / number of slots``.
    """
    total = 0.0
    slots = 0
    for items in lists.values():
        for item in items:
            value = float(popularity.get(item, 0.0))
            if not math.isfinite(value) or value < 0:
                raise ValueError(f"popularity of {item!r} must be finite and non-negative")
            total += value
            slots += 1
    if slots == 0:
        raise ValueError("lists must show at least one item")
    return total / slots


def jaccard(a: Iterable[str], b: Iterable[str]) -> float:
    """Jaccard similarity ``|A & B| / |A | B|`` of two item sets [4]; two empty sets give 1."""
    sa, sb = set(a), set(b)
    union = len(sa | sb)
    return 1.0 if union == 0 else len(sa & sb) / union


def _check_p(p: float) -> float:
    if not (isinstance(p, (int, float)) and 0.0 < p < 1.0):
        raise ValueError(f"p must be a number in (0, 1), got {p!r}")
    return float(p)


def rbo_ext(s: Sequence[str], t: Sequence[str], *, p: float = 0.9) -> float:
    """Extrapolated rank-biased overlap of two top-k lists [3].

    Parameters
    ----------
    s, t : sequence of str
        Two rankings, best first, without repeated items; either may be the longer.
    p : float, default 0.9
        Persistence in (0, 1): the weight of depth ``d`` falls as ``p ** (d - 1)``. With
        ``p = 0.9`` the first 10 ranks carry 86 % of the weight ([3], eq. 21).

    Returns
    -------
    float
        RBO_EXT in [0, 1]: 1 for identical lists, 0 for lists with no item in common.

    Notes
    -----
    Follows [3], eq. 32: with ``X_d`` the size of the overlap of the two prefixes of depth
    ``d``, ``l`` the longer and ``s`` the shorter length,

        RBO_EXT = (1 - p) / p * (sum_{d=1..l} X_d / d * p**d
                                 + sum_{d=s+1..l} X_s * (d - s) / (s * d) * p**d)
                  + ((X_l - X_s) / l + X_s / s) * p**l

    which for lists of equal length reduces to eq. 30. It assumes the agreement seen at the
    deepest evaluated rank continues below it. Two empty lists give 1; one empty list gives 0.
    """
    p = _check_p(p)
    if len(set(s)) != len(s) or len(set(t)) != len(t):
        raise ValueError("rankings must not repeat an item")
    short, long_ = (list(s), list(t)) if len(s) <= len(t) else (list(t), list(s))
    n_s, n_l = len(short), len(long_)
    if n_l == 0:
        return 1.0
    if n_s == 0:
        return 0.0
    seen_s: set[str] = set()
    seen_l: set[str] = set()
    overlap = 0
    x = np.zeros(n_l + 1)
    for d in range(1, n_l + 1):
        a = short[d - 1] if d <= n_s else None
        b = long_[d - 1]
        if a is not None and a == b:
            overlap += 1
        else:
            if a is not None and a in seen_l:
                overlap += 1
            if b in seen_s:
                overlap += 1
        if a is not None:
            seen_s.add(a)
        seen_l.add(b)
        x[d] = overlap
    depth = np.arange(1, n_l + 1)
    powers = p**depth
    total = float(np.sum(x[1:] / depth * powers))
    x_s = x[n_s]
    if n_l > n_s:
        tail = depth[n_s:]
        total += float(np.sum(x_s * (tail - n_s) / (n_s * tail) * powers[n_s:]))
    value = (1.0 - p) / p * total + ((x[n_l] - x_s) / n_l + x_s / n_s) * p**n_l
    return float(min(max(value, 0.0), 1.0))


def rbo_prefix_weight(p: float, d: int) -> float:
    """Share of RBO's weight that falls on the first *d* ranks ([3], eq. 21).

    ``W(1:d) = 1 - p**(d-1) + (1 - p) / p * d * (ln(1 / (1 - p)) - sum_{i=1..d-1} p**i / i)``.
    With ``p = 0.9`` and ``d = 10`` it is about 0.86, the paper's worked figure.
    """
    p = _check_p(p)
    if not isinstance(d, int) or d < 1:
        raise ValueError(f"d must be a positive integer, got {d!r}")
    partial = sum(p**i / i for i in range(1, d))
    return float(1.0 - p ** (d - 1) + (1.0 - p) / p * d * (math.log(1.0 / (1.0 - p)) - partial))


def overlap(
    candidate: Lists, other: Lists, *, measure: str, p: float = 0.9
) -> OverlapSummary | None:
    """Per-group overlap of *candidate* with *other* over the groups both carry.

    Parameters
    ----------
    candidate, other : mapping
        Group -> items.
    measure : {"jaccard", "rbo"}
        Jaccard similarity of the item sets [4], or extrapolated RBO with persistence *p* [3].
    p : float, default 0.9
        RBO persistence.

    Returns
    -------
    OverlapSummary or None
        None when no group is in both.
    """
    if measure not in ("jaccard", "rbo"):
        raise ValueError(f"measure must be 'jaccard' or 'rbo', got {measure!r}")
    common = sorted(set(candidate) & set(other))
    if not common:
        return None
    values: dict[str, float] = {}
    for g in common:
        if measure == "jaccard":
            values[g] = jaccard(candidate[g], other[g])
        else:
            values[g] = rbo_ext(candidate[g], other[g], p=p)
    array = np.fromiter(values.values(), dtype=np.float64, count=len(values))
    q10, q50, q90 = (float(v) for v in np.quantile(array, [0.1, 0.5, 0.9]))
    return OverlapSummary(
        groups=len(common), mean=float(array.mean()), quantiles=(q10, q50, q90), per_group=values
    )
