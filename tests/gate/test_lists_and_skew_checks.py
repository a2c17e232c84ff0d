"""The lists and skew checks through service.gate.evaluate.evaluate."""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pytest

from service.gate.evaluate import evaluate
from service.gate.policy import PolicyError, parse_policy
from service.gate.types import GateInput, Sample, Snapshot
from service.stats import lists as list_stats

NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)
CATALOG = 400


def _list_sample(seed: int, *, head_bias: float, groups: int = 300, k: int = 10) -> Sample:
    """Generated lists (invented data): each reader's top-k by a score that mixes a Zipf-like
    popularity with the reader's own taste (*head_bias* 0: taste only, 1: popularity only),
    plus a little noise that differs from one retrain (*seed*) to the next."""
    rng = np.random.default_rng(seed)
    taste_rng = np.random.default_rng(99)  # the same readers' tastes every time
    popularity = 1.0 / np.arange(1, CATALOG + 1)
    popularity /= popularity.sum()
    rows_group, rows_item, rows_rank = [], [], []
    for g in range(groups):
        taste = taste_rng.dirichlet(np.full(CATALOG, 0.3))
        score = np.log(head_bias * popularity + (1 - head_bias) * taste)
        score += rng.normal(0, 0.1, CATALOG)
        chosen = np.argsort(-score)[:k]
        rows_group += [f"reader-{g}"] * k
        rows_item += [f"book-{i}" for i in chosen]
        rows_rank += list(range(1, k + 1))
    n = len(rows_group)
    return Sample(
        {
            "score": np.linspace(0.9, 0.1, n),
            "group": np.array(rows_group, dtype=object),
            "item": np.array(rows_item, dtype=object),
            "rank": np.array(rows_rank, dtype=float),
        }
    )


def _snap(key: str, sample: Sample, metrics: dict[str, float] | None = None) -> Snapshot:
    return Snapshot(model="also-read", key=key, sample=sample, metrics=metrics or {})


LIST_POLICY = """
models = ["also-read"]
[sample]
min_rows = 100
max_mode_share = 1.0

[[checks]]
name = "coverage"
kind = "lists"
statistic = "coverage"
max_relative_change = 0.2
catalog_size = 400

[[checks]]
name = "gini"
kind = "lists"
statistic = "gini"
max_change = 0.05
catalog_size = 400

[[checks]]
name = "popularity"
kind = "lists"
statistic = "popularity"
max_relative_change = 0.10

[[checks]]
name = "rbo"
kind = "lists"
statistic = "rbo"
min = 0.2
"""


def _verdict(cand: Sample, base: Sample, policy_text: str = LIST_POLICY, metrics=None):
    policy = parse_policy(policy_text, name="t")
    inp = GateInput(candidate=_snap("c", cand, metrics), baseline=_snap("b", base), now=NOW)
    verdict = evaluate(inp, policy)
    return verdict, {f.check: f for f in verdict.findings}


def test_a_healthy_retrain_passes_every_list_check() -> None:
    verdict, found = _verdict(_list_sample(2, head_bias=0.3), _list_sample(1, head_bias=0.3))
    assert verdict.decision == "promote", verdict.reasons
    assert {found[c].outcome for c in ("coverage", "gini", "popularity", "rbo")} == {"ok"}


def test_a_popularity_collapse_is_held() -> None:
    base = _list_sample(1, head_bias=0.3)
    cand = _list_sample(2, head_bias=0.97)  # nearly everyone gets the bestsellers
    verdict, found = _verdict(cand, base)
    assert verdict.decision == "hold"
    for check in ("coverage", "gini", "popularity"):
        assert found[check].outcome == "breach", found[check].message
    # Coverage measured by hand from the same lists (definition: distinct shown / catalog).
    cand_lists = list_stats.ranked_lists(
        cand.column("group"), cand.column("item"), cand.column("rank"), k=10
    )
    assert found["coverage"].candidate_value == pytest.approx(
        len(list_stats.exposure(cand_lists)) / CATALOG
    )
    assert found["coverage"].details["catalog_size_source"] == "policy catalog_size"


def test_reported_catalog_size_wins_and_observed_is_the_fallback() -> None:
    base, cand = _list_sample(1, head_bias=0.3), _list_sample(2, head_bias=0.3)
    _, found = _verdict(cand, base, metrics={"catalog_size": 1000.0})
    assert found["coverage"].details["catalog_size"] == 1000
    text = LIST_POLICY.replace("catalog_size = 400\n", "")
    _, found = _verdict(cand, base, text)
    assert found["coverage"].details["catalog_size_source"].startswith("observed")


def test_supplied_popularity_from_reported_metrics() -> None:
    base, cand = _list_sample(1, head_bias=0.3), _list_sample(2, head_bias=0.3)
    text = LIST_POLICY.replace(
        "max_relative_change = 0.10\n", 'max_relative_change = 0.10\npopularity = "supplied"\n'
    )
    metrics = {f"popularity.book-{i}": 1000.0 / (i + 1) for i in range(CATALOG)}
    _, found = _verdict(cand, base, text, metrics=metrics)
    assert found["popularity"].details["popularity_source"] == f"supplied ({CATALOG} items)"
    assert found["popularity"].outcome == "ok"
    _, collapsed = _verdict(_list_sample(2, head_bias=0.97), base, text, metrics=metrics)
    # Interaction counts separate head from tail far more than list shares do.
    assert collapsed["popularity"].outcome == "breach" and collapsed["popularity"].value > 0.4
    _, missing = _verdict(cand, base, text)
    assert (
        missing["popularity"].outcome == "breach" and "no metric" in missing["popularity"].message
    )


def test_overlap_is_measured_over_common_groups_and_needs_enough_of_them() -> None:
    base = _list_sample(1, head_bias=0.3)
    _, same = _verdict(base, base)
    assert same["rbo"].value == pytest.approx(1.0)
    few = _list_sample(2, head_bias=0.3, groups=5)
    _, found = _verdict(few, base)
    assert found["rbo"].outcome == "inconclusive" and "fewer than the 20" in found["rbo"].message


def test_lists_skipped_without_list_columns() -> None:
    plain = Sample({"score": np.linspace(0.1, 0.9, 200)})
    verdict, found = _verdict(plain, _list_sample(1, head_bias=0.3))
    assert found["rbo"].outcome == "skipped" and "no group/item/rank" in found["rbo"].message


@pytest.mark.parametrize(
    ("table", "match"),
    [
        ('statistic = "rbo"\n', "needs 'min'"),
        ('statistic = "gini"\n', "exactly one of max_change"),
        ('statistic = "gini"\nmax_change = 0.1\nmin = 0.5\n', "'min' goes with"),
        ('statistic = "rbo"\nmin = 0.5\nmax_change = 0.1\n', "takes 'min'"),
    ],
)
def test_lists_policy_errors(table: str, match: str) -> None:
    with pytest.raises(PolicyError, match=match):
        parse_policy(f'models = ["m"]\n[[checks]]\nname = "l"\nkind = "lists"\n{table}', name="b")


SKEW_POLICY = """
models = ["shelf-ranker"]
[sample]
min_rows = 100
[[checks]]
name = "skew-mad"
kind = "skew"
statistic = "mean-abs-diff"
max = 0.01
[[checks]]
name = "skew-share"
kind = "skew"
statistic = "share-differing"
tolerance = 0.02
max = 0.05
"""


def _skew(served: np.ndarray, offline: np.ndarray):
    sample = Sample(
        {
            "score": np.linspace(0.05, 0.95, served.size),
            "served_score": served,
            "baseline_score": offline,
        }
    )
    policy = parse_policy(SKEW_POLICY, name="t")
    verdict = evaluate(GateInput(candidate=_snap("c", sample), baseline=None, now=NOW), policy)
    return verdict, {f.check: f for f in verdict.findings}


def test_skew_agreeing_scores_pass() -> None:
    offline = np.random.default_rng(1).uniform(0, 1, 1000)
    served = offline + np.random.default_rng(2).normal(0, 0.001, 1000)
    verdict, found = _skew(served, offline)
    assert verdict.decision == "promote"
    assert found["skew-mad"].value == pytest.approx(np.mean(np.abs(served - offline)))


def test_skew_from_a_broken_feature_is_held() -> None:
    offline = np.random.default_rng(1).uniform(0.05, 0.8, 1000)
    served = offline.copy()
    served[:200] += 0.15  # a fifth of the rows were served with a stale feature
    verdict, found = _skew(served, offline)
    assert verdict.decision == "hold"
    assert found["skew-share"].value == pytest.approx(0.2)
    assert found["skew-mad"].outcome == "breach" and "features" in found["skew-mad"].message


def test_skew_counts_missing_scores_as_differing_and_skips_without_columns() -> None:
    offline = np.random.default_rng(1).uniform(0, 1, 1000)
    served = offline.copy()
    served[:100] = np.nan
    _, found = _skew(served, offline)
    assert found["skew-share"].value == pytest.approx(0.1)
    assert "100 row(s) miss a score" in found["skew-share"].message
    plain = Sample({"score": np.linspace(0.05, 0.95, 500)})
    policy = parse_policy(SKEW_POLICY, name="t")
    verdict = evaluate(GateInput(candidate=_snap("c", plain), baseline=None, now=NOW), policy)
    assert {f.outcome for f in verdict.findings if f.kind == "skew"} == {"skipped"}
