"""The ``off-policy`` check: decision rules, diagnostics, log health, segments, policy keys."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from service.gate.evaluate import evaluate
from service.gate.policy import PolicyError, parse_policy
from service.gate.types import Finding, GateInput, HistoryEntry, Sample, Snapshot
from service.stats.offpolicy import compare, prepare

NOW = datetime(2026, 12, 1, 3, 0, tzinfo=UTC)
K = 50  # candidate books per slot, explored uniformly


def policy(check: str = "", *, on_inconclusive: str = "hold") -> Any:
    text = f"""
models = ["*"]
on_inconclusive = "{on_inconclusive}"
[sample]
min_rows = 10
score_min = 0.0
score_max = 1.0
[[checks]]
name = "op"
kind = "off-policy"
{check}
"""
    return parse_policy(text, name="t")


def _softmax(x: np.ndarray) -> np.ndarray:
    e = np.exp(x - x.max(axis=1, keepdims=True))
    out: np.ndarray = e / e.sum(axis=1, keepdims=True)
    return out


def logged(
    seed: int,
    n: int = 6000,
    *,
    candidate: str = "same",
    web_candidate: str | None = None,
) -> dict[str, np.ndarray]:
    """Invented exploration log: each slot shows one of K books uniformly at random; clicks
    follow each book's appeal; the baseline and the candidate are softmax policies."""
    rng = np.random.default_rng(seed)
    appeal = rng.normal(-2.0, 1.0, (n, K))
    click = 1 / (1 + np.exp(-appeal))
    shared = rng.normal(0, 1.0, (n, K))  # what both models believe beyond the appeal
    base = _softmax(appeal + shared)
    device = np.where(rng.random(n) < 0.5, "app", "web")

    def policy_of(kind: str) -> np.ndarray:
        if kind == "same":  # a retrain: the baseline's beliefs with a little new noise
            return _softmax(appeal + shared + rng.normal(0, 0.2, (n, K)))
        if kind == "worse":  # prefers books readers do not click
            return _softmax(-0.6 * appeal + shared)
        if kind == "peaked":  # nearly deterministic: few logged rows agree with it
            return _softmax(8.0 * (appeal + shared))
        if kind == "outside":  # 40% of its choices are books the exploration never shows
            return 0.6 * _softmax(appeal + shared)
        raise ValueError(kind)

    cand = policy_of(candidate)
    if web_candidate is not None:
        cand = np.where((device == "web")[:, None], policy_of(web_candidate), cand)
    action = rng.integers(0, K, n)
    rows = np.arange(n)
    reward = (rng.random(n) < click[rows, action]).astype(float)
    r_hat = np.clip(click + rng.normal(0, 0.02, (n, K)), 0, 1)
    return {
        "score": rng.random(n),
        "reward": reward,
        "logging_propensity": np.full(n, 1.0 / K),
        "candidate_propensity": cand[rows, action],
        "baseline_propensity": base[rows, action],
        "reward_prediction": r_hat[rows, action],
        "candidate_expected_reward": (cand * r_hat).sum(axis=1),
        "baseline_expected_reward": (base * r_hat).sum(axis=1),
        "segment.device": np.array(device.tolist(), dtype=object),
    }


def judge(columns: dict[str, np.ndarray], pol: Any, history: tuple[HistoryEntry, ...] = ()) -> Any:
    candidate = Snapshot(model="shelf-ranker", key="c", sample=Sample(columns))
    baseline = Snapshot(model="shelf-ranker", key="b")
    return evaluate(
        GateInput(candidate=candidate, baseline=baseline, now=NOW, history=history), pol
    )


def finding(verdict: Any, check: str = "op") -> Finding:
    return next(f for f in verdict.findings if f.check == check)


NONINF = 'estimator = "{est}"\nrule = "non-inferiority"\nmargin = 0.02\nmin_ess = 300'


@pytest.mark.parametrize("est", ["ips", "snips", "dr"])
def test_same_policy_is_non_inferior(est: str) -> None:
    verdict = judge(logged(1), policy(NONINF.format(est=est)))
    f = finding(verdict)
    assert f.outcome == "ok", f.message
    assert verdict.decision == "promote"
    assert f.statistic == f"{est} reward change"
    # the finding carries both estimates, the change and its interval (what learning needs)
    assert f.value == pytest.approx(f.candidate_value - f.baseline_value)  # type: ignore[operator]
    assert f.interval is not None and f.interval[0] < f.value < f.interval[1]
    d = f.details
    for side in ("candidate", "baseline"):
        assert {
            "estimate",
            "interval",
            "ess",
            "max_weight",
            "max_weight_share",
            "zero_rows",
        } <= set(d[side])
    assert d["equal_propensity_rows"] == 0
    assert set(d["learn"]) >= {"ess_candidate", "ess_baseline"}
    assert finding(verdict, "health.log").outcome == "ok"


@pytest.mark.parametrize("est", ["ips", "snips", "dr"])
def test_worse_policy_is_held(est: str) -> None:
    columns = logged(2, candidate="worse")
    verdict = judge(columns, policy(NONINF.format(est=est)))
    f = finding(verdict)
    assert f.outcome == "breach", f.message
    assert verdict.decision == "hold"
    assert "worse than the baseline by more than the margin 0.02" in f.message
    # the finding's numbers are those of the statistics module on the same rows
    log = prepare(
        columns["reward"],
        columns["logging_propensity"],
        columns["candidate_propensity"],
        columns["baseline_propensity"],
        reward_prediction=columns["reward_prediction"],
        candidate_expected_reward=columns["candidate_expected_reward"],
        baseline_expected_reward=columns["baseline_expected_reward"],
    )
    c = compare(log, est)  # type: ignore[arg-type]
    assert f.value == pytest.approx(c.change.estimate)
    assert f.interval == pytest.approx(c.change.interval)


def test_small_effective_sample_is_inconclusive_with_the_reason() -> None:
    verdict = judge(logged(3, candidate="peaked"), policy(NONINF.format(est="snips")))
    f = finding(verdict)
    assert f.outcome == "inconclusive"
    assert "underpowered" in f.message and "effective sample size" in f.message
    assert f.details["underpowered"] is True
    assert verdict.decision == "hold"  # on_inconclusive = "hold"


def test_policy_outside_the_log_is_inconclusive() -> None:
    verdict = judge(logged(4, candidate="outside"), policy(NONINF.format(est="ips")))
    f = finding(verdict)
    assert f.outcome == "inconclusive"
    assert "never takes" in f.message
    assert f.details["candidate"]["mean_weight"] == pytest.approx(0.6, abs=0.05)


def test_log_equal_to_the_candidate_is_not_exploration() -> None:
    columns = logged(5)
    columns["logging_propensity"] = columns["candidate_propensity"].copy()
    f = finding(judge(columns, policy(NONINF.format(est="ips"))))
    assert f.outcome == "inconclusive" and "not exploration" in f.message
    assert f.details["equal_propensity_share"] == 1.0


@pytest.mark.parametrize(
    ("column", "value", "text"),
    [
        ("logging_propensity", 0.0, "outside (0, 1]"),
        ("logging_propensity", 1.2, "outside (0, 1]"),
        ("candidate_propensity", -0.1, "outside [0, 1]"),
        ("baseline_propensity", np.nan, "non-finite"),
        ("reward", np.inf, "non-finite"),
    ],
)
def test_unhealthy_log_holds_naming_column_and_row(column: str, value: float, text: str) -> None:
    columns = logged(6, n=2000)
    columns[column] = columns[column].copy()
    columns[column][17] = value
    verdict = judge(columns, policy(NONINF.format(est="ips"), on_inconclusive="promote"))
    health = finding(verdict, "health.log")
    assert health.outcome == "breach" and health.blocking
    assert text in health.message and f"sample.{column}[17]" in health.message
    assert verdict.decision == "hold"  # fail closed even when inconclusive would promote
    assert finding(verdict).outcome == "inconclusive"


def test_logging_policy_that_never_explores_holds() -> None:
    columns = logged(7, n=2000)
    columns["logging_propensity"] = np.ones(2000)
    verdict = judge(columns, policy(NONINF.format(est="snips")))
    assert "never explores" in finding(verdict, "health.log").message
    assert verdict.decision == "hold"


def test_rows_with_every_log_column_null_are_not_logged() -> None:
    columns = logged(8, n=8000)
    for name in ("reward", "logging_propensity", "candidate_propensity", "baseline_propensity"):
        columns[name] = columns[name].copy()
        columns[name][:2000] = np.nan
    f = finding(judge(columns, policy(NONINF.format(est="ips"))))
    assert f.details["rows_logged"] == 6000 and f.details["rows_total"] == 8000


def test_without_log_columns_the_check_is_skipped_and_no_log_health() -> None:
    columns = {"score": np.random.default_rng(1).random(100)}
    verdict = judge(columns, policy(NONINF.format(est="ips")))
    assert finding(verdict).outcome == "skipped"
    assert not [f for f in verdict.findings if f.check == "health.log"]


def test_segments_holm_and_bh_match_statsmodels() -> None:
    columns = logged(9, n=12_000, web_candidate="worse")
    for correction in ("holm", "bh"):
        check = NONINF.format(est="snips") + (
            f'\nsegments = ["device"]\nmin_segment_rows = 1000\ncorrection = "{correction}"'
        )
        f = finding(judge(columns, policy(check)))
        table = {row["segment"]: row for row in f.details["segments"]}
        assert table["device=web"]["outcome"] == "breach"
        assert table["device=app"]["outcome"] == "ok"
        raw = [table[s]["p_worse"] for s in ("(all)", "device=app", "device=web")]
        method = "holm" if correction == "holm" else "fdr_bh"
        expected = multipletests(raw, method=method)[1]  # statsmodels as the reference
        got = [table[s]["p_worse_adjusted"] for s in ("(all)", "device=app", "device=web")]
        assert got == pytest.approx(expected, rel=1e-9)
        assert f.outcome == "breach" and "device=web" in f.message


def test_clipping_reports_its_bias_bound() -> None:
    check = NONINF.format(est="ips") + "\nmax_weight = 5"
    f = finding(judge(logged(10), policy(check)))
    cand = f.details["candidate"]
    assert cand["clipped_rows"] > 0
    assert cand["clipping_bias_bound"] == pytest.approx(cand["clipped_mass"] * 1.0)
    assert "clipping bias at most" in f.message


def test_limit_superiority_and_leak_guard() -> None:
    columns = logged(11, candidate="worse")
    limit = finding(judge(columns, policy('rule = "limit"\nmargin = 0.5\nmin_ess = 300')))
    assert limit.outcome == "ok"  # the point loss is far inside 0.5
    sup = finding(judge(logged(12), policy('rule = "superiority"\nmargin = 0.05\nmin_ess = 300')))
    assert sup.outcome == "breach"  # a like-for-like candidate is not 0.05 better
    swapped = logged(13)  # now the baseline is the worse one: a large gain trips the guard
    swapped["baseline_propensity"] = logged(13, candidate="worse")["candidate_propensity"]
    leak = finding(
        judge(swapped, policy('rule = "non-inferiority"\nmargin = 0.01\nmax_gain = 0.01'))
    )
    assert leak.outcome == "breach" and "max_gain" in leak.message


def test_bootstrap_method_runs_and_is_named() -> None:
    check = NONINF.format(est="snips") + '\nmethod = "bootstrap"\nresamples = 200'
    f = finding(judge(logged(14, n=3000), policy(check)))
    assert f.details["method"] == "snips-paired-bootstrap"
    assert f.outcome in ("ok", "inconclusive")


def test_adaptive_limit_learns_from_the_change() -> None:
    check = NONINF.format(est="snips") + (
        '\n[checks.adaptive]\nmethod = "quantile"\nquantile = 0.99\nmin_history = 5\nwindow = 10'
    )
    history = tuple(
        HistoryEntry(
            snapshot_key=f"h{i}",
            created_at=NOW,
            decision="promote",
            effective_decision="promote",
            healthy=True,
            values={"op": 0.02 + 0.001 * i},
        )
        for i in range(10)
    )
    f = finding(judge(logged(15), policy(check), history))
    assert f.details["adaptive"]["used"] is True
    assert f.details["adaptive"]["side"] == "lower"
    # the history's changes were all >= 0.02: a like-for-like change falls below the learned
    # lower limit, so the learned rule holds where the margin alone would promote
    assert f.outcome == "breach"


@pytest.mark.parametrize(
    ("check", "key"),
    [
        ('rule = "non-inferiority"', "margin"),
        ('rule = "limit"', "margin"),
        ('margin = 0.1\nagainst = "reference"', "baseline"),
        ('margin = 0.1\nestimator = "dm"', "estimator"),
        ("margin = 0.1\nmax_weight = 0.5", "max_weight"),
        ("margin = 0.1\nmin_ess = 1", "min_ess"),
    ],
)
def test_policy_keys_are_checked(check: str, key: str) -> None:
    with pytest.raises(PolicyError, match=key):
        policy(check)


def test_overflowing_weights_fail_closed() -> None:
    columns = logged(16, n=2000)
    columns["logging_propensity"] = columns["logging_propensity"].copy()
    columns["logging_propensity"][5] = 1e-300  # in range, but its weight overflows
    columns["candidate_propensity"] = columns["candidate_propensity"].copy()
    columns["candidate_propensity"][5] = 1.0
    verdict = judge(columns, policy(NONINF.format(est="ips"), on_inconclusive="promote"))
    f = finding(verdict)
    assert f.outcome == "inconclusive"
    assert "weights overflow" in f.message and f.details["underpowered"] is True
