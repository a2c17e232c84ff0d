"""Recommendation-list measures (service.stats.lists) against published values and properties."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import auc

from service.stats import lists

# --- Gini coefficient -----------------------------------------------------------------------


@pytest.mark.parametrize("n", [1, 2, 7, 1000])
def test_gini_of_equal_exposure_is_zero(n: int) -> None:
    # Gini (1912): no inequality, no mean difference.
    assert lists.gini(np.full(n, 3.0)) == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("n", [2, 3, 10, 500])
def test_gini_of_all_exposure_on_one_item_is_n_minus_1_over_n(n: int) -> None:
    # Gini (1912), population form: one of n holds everything -> (n - 1) / n.
    values = np.zeros(n)
    values[n // 2] = 42.0
    assert lists.gini(values) == pytest.approx((n - 1) / n, rel=1e-12)


def test_gini_textbook_example_nine_tens_and_one_hundred() -> None:
    # Sutton, G. (2024). Statistics Slam Dunk. Manning, section 12.5: incomes
    # rep(c(10, 100), times = c(9, 1)) give ineq(f) = 0.4263158 (R package ineq, Gini).
    assert lists.gini([10] * 9 + [100]) == pytest.approx(0.4263158, abs=5e-8)


def test_gini_ineq_documentation_example() -> None:
    # R package phylotools, gini() help page (algorithm taken from package ineq):
    # gini(c(1,3,2,1,1,1,4)) gives 0.3076923.
    assert lists.gini([1, 3, 2, 1, 1, 1, 4]) == pytest.approx(0.3076923, abs=5e-8)


@pytest.mark.parametrize("seed", [11, 12])
def test_gini_is_one_minus_twice_the_area_under_the_lorenz_curve(seed: int) -> None:
    # Lorenz (1905): G = 1 - 2 * area under the Lorenz curve; area by scikit-learn's
    # trapezoidal sklearn.metrics.auc over the curve's points.
    x = np.sort(np.random.default_rng(seed).pareto(2.0, size=300))
    population = np.concatenate([[0.0], np.arange(1, x.size + 1) / x.size])
    share = np.concatenate([[0.0], np.cumsum(x) / x.sum()])
    assert lists.gini(x) == pytest.approx(1.0 - 2.0 * auc(population, share), rel=1e-9)


@pytest.mark.parametrize(
    ("draw", "expected"),
    [
        # Kleiber & Kotz (2003), Statistical Size Distributions in Economics and Actuarial
        # Sciences, Wiley: Gini of the uniform(0, b) distribution is 1/3, of the exponential
        # 1/2 (from memory; both also follow from G = 1 - E[min(X1, X2)] / mu, Farris 2010).
        (lambda rng: rng.uniform(0, 1, 200_000), 1 / 3),
        (lambda rng: rng.exponential(1, 200_000), 1 / 2),
    ],
)
def test_gini_of_known_continuous_distributions(draw: object, expected: float) -> None:
    sample = draw(np.random.default_rng(2026))  # type: ignore[operator]
    # Tolerance: the standard error of G at n = 200,000 is below 0.002.
    assert lists.gini(sample) == pytest.approx(expected, abs=0.005)


def test_gini_rejects_bad_input() -> None:
    with pytest.raises(ValueError, match="non-negative"):
        lists.gini([1.0, -1.0])
    with pytest.raises(ValueError, match="all be zero"):
        lists.gini([0.0, 0.0])
    with pytest.raises(ValueError, match="NaN or infinite"):
        lists.gini([1.0, float("nan")])


# --- lists, coverage, popularity --------------------------------------------------------------


def test_ranked_lists_sorts_by_rank_and_cuts_at_k() -> None:
    group = ["r1", "r1", "r1", "r2", "r2", "r1"]
    item = ["b", "a", "c", "x", "y", "a"]
    rank = [2, 1, 3, 1, float("nan"), 4]
    built = lists.ranked_lists(group, item, rank, k=2)
    assert built == {"r1": ("a", "b"), "r2": ("x",)}


def test_ranked_lists_keeps_an_item_once_per_group() -> None:
    built = lists.ranked_lists(["g"] * 3, ["a", "a", "b"], [1, 2, 3], k=3)
    assert built == {"g": ("a", "b")}


def test_summarise_lists_coverage_and_gini_over_the_catalog() -> None:
    # Two lists of 2 over a catalog of 8: items a (twice), b, c shown -> coverage 3/8; the
    # Gini of the exposure (2, 1, 1, 0, 0, 0, 0, 0) by Gini's mean-difference definition.
    lists_ = {"g1": ("a", "b"), "g2": ("a", "c")}
    summary = lists.summarise_lists(lists_, catalog_size=8)
    assert summary.coverage == pytest.approx(3 / 8)
    exposure = np.array([2, 1, 1, 0, 0, 0, 0, 0], dtype=float)
    pairs = np.abs(exposure[:, None] - exposure[None, :]).sum()
    mean_difference = pairs / (2 * exposure.size**2 * exposure.mean())
    assert summary.gini == pytest.approx(mean_difference, rel=1e-12)
    with pytest.raises(ValueError, match="smaller than the 3 distinct"):
        lists.summarise_lists(lists_, catalog_size=2)


def test_mean_popularity_and_list_share_popularity() -> None:
    baseline = {"g1": ("a", "b"), "g2": ("a", "c"), "g3": ("d", "e"), "g4": ("a", "f")}
    popularity = lists.list_share_popularity(baseline)
    assert popularity["a"] == pytest.approx(0.75) and popularity["f"] == pytest.approx(0.25)
    collapsed = dict.fromkeys(baseline, ("a", "b"))
    assert lists.mean_popularity(collapsed, popularity) == pytest.approx((0.75 + 0.25) / 2)
    assert lists.mean_popularity({"g": ("zzz",)}, popularity) == 0.0


# --- Jaccard and rank-biased overlap ----------------------------------------------------------


def test_jaccard_example() -> None:
    # Jaccard (1912): |{b, c}| / |{a, b, c, d}| = 0.5.
    assert lists.jaccard(["a", "b", "c"], ["b", "c", "d"]) == 0.5
    assert lists.jaccard([], []) == 1.0


@pytest.mark.parametrize("p", [0.5, 0.9, 0.98])
@pytest.mark.parametrize("k", [1, 5, 20])
def test_rbo_of_identical_lists_is_one_and_of_disjoint_lists_zero(p: float, k: int) -> None:
    # Webber, Moffat & Zobel (2010), section 4: RBO is 1 for identical and 0 for disjoint
    # rankings; the extrapolated RBO_EXT keeps both properties at any evaluation depth.
    s = [f"i{j}" for j in range(k)]
    t = [f"o{j}" for j in range(k)]
    assert lists.rbo_ext(s, s, p=p) == pytest.approx(1.0, abs=1e-12)
    assert lists.rbo_ext(s, t, p=p) == 0.0


def test_rbo_is_top_weighted() -> None:
    # Webber et al. (2010): disagreement at the top costs more than the same disagreement
    # lower down. Swapping ranks 1-2 vs ranks 9-10 of a 10-list; replacing the top item vs
    # the bottom item.
    s = [f"i{j}" for j in range(10)]
    swap_top = [s[1], s[0], *s[2:]]
    swap_bottom = [*s[:8], s[9], s[8]]
    assert lists.rbo_ext(s, swap_top) < lists.rbo_ext(s, swap_bottom) < 1.0
    new_top = ["new", *s[1:]]
    new_bottom = [*s[:9], "new"]
    assert lists.rbo_ext(s, new_top) < lists.rbo_ext(s, new_bottom) < 1.0


def test_rbo_is_symmetric_and_handles_uneven_lists() -> None:
    # RBO is symmetric (Webber et al. 2010, section 4); eq. 32 covers lists of uneven length:
    # a list that is a prefix of the other agrees as far as it goes, so RBO_EXT is 1.
    s = ["a", "b", "c", "d", "e"]
    t = ["b", "a", "g", "e"]
    assert lists.rbo_ext(s, t) == pytest.approx(lists.rbo_ext(t, s), rel=1e-12)
    assert lists.rbo_ext(["a", "b"], ["a", "b", "c", "d"]) == pytest.approx(1.0, abs=1e-12)


def _rbo_ext_by_definition(s: list[str], t: list[str], p: float, depth: int = 4000) -> float:
    # Webber et al. (2010), eq. 7 with agreement A_d = X_d / d, summed far past the lists'
    # end with the extrapolation of section 4.3: A_d stays at A_k below depth k (equal lengths).
    k = len(s)
    total = 0.0
    for d in range(1, depth + 1):
        x_d = len(set(s[: min(d, k)]) & set(t[: min(d, k)]))
        a_d = x_d / d if d <= k else x_d / k
        total += (1 - p) * p ** (d - 1) * a_d
    return total


@pytest.mark.parametrize("p", [0.8, 0.9])
def test_rbo_ext_closed_form_matches_the_definition_summed(p: float) -> None:
    s = ["a", "b", "c", "d", "e", "f"]
    t = ["b", "a", "x", "d", "f", "y"]
    assert lists.rbo_ext(s, t, p=p) == pytest.approx(_rbo_ext_by_definition(s, t, p), abs=1e-9)


def test_rbo_hand_worked_small_example() -> None:
    # s = (a, b, c), t = (a, c, b), p = 0.5: X = (1, 1, 3), eq. 30:
    # (1-p)/p * (1*0.5 + 1/2*0.25 + 3/3*0.125) + 1 * 0.125 = 0.75 + 0.125 = 0.875.
    assert lists.rbo_ext(["a", "b", "c"], ["a", "c", "b"], p=0.5) == pytest.approx(0.875)


@pytest.mark.parametrize(("p", "d", "expected"), [(0.9, 10, 0.8556), (0.98, 50, 0.8522)])
def test_rbo_prefix_weight_worked_values(p: float, d: int, expected: float) -> None:
    # Webber et al. (2010), eq. 21 and the text after it (p. 19): with p = 0.9 the first 10
    # ranks carry 86 % of the weight; p = 0.98 gives the top 50 about the same.
    assert lists.rbo_prefix_weight(p, d) == pytest.approx(expected, abs=5e-4)
    # The same weight from the definition: rank r gets sum_{depth >= r} (1-p) p^(depth-1) / depth.
    depths = np.arange(1, 20_000)
    per_depth = (1 - p) * p ** (depths - 1) / depths
    tail = np.cumsum(per_depth[::-1])[::-1]  # weight of rank r = tail[r - 1]
    assert lists.rbo_prefix_weight(p, d) == pytest.approx(tail[:d].sum(), abs=1e-9)


def test_overlap_over_common_groups() -> None:
    cand = {"g1": ("a", "b"), "g2": ("c", "d"), "g3": ("e", "f")}
    base = {"g1": ("a", "b"), "g2": ("x", "y"), "g9": ("e", "f")}
    summary = lists.overlap(cand, base, measure="jaccard")
    assert summary is not None and summary.groups == 2 and summary.mean == pytest.approx(0.5)
    assert lists.overlap({"g": ("a",)}, {"h": ("a",)}, measure="rbo") is None
    with pytest.raises(ValueError, match="measure must be"):
        lists.overlap(cand, base, measure="kendall")
    with pytest.raises(ValueError, match="must not repeat"):
        lists.rbo_ext(["a", "a"], ["a"])
