"""Adaptive limits (service.gate.adaptive) through service.gate.evaluate.evaluate."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from scipy import stats as sps

from service.gate.evaluate import evaluate
from service.gate.policy import PolicyError, parse_policy
from service.gate.types import GateInput, HistoryEntry, Sample, Snapshot

NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)


def _snap(key: str, metrics: dict[str, float], **extra: object) -> Snapshot:
    return Snapshot(
        model="shelf-ranker",
        key=key,
        metrics=metrics,
        sample=Sample({"score": np.linspace(0.01, 0.99, 50)}),
        **extra,  # type: ignore[arg-type]
    )


def _entry(
    i: int,
    value: float | None,
    *,
    decision: str = "promote",
    effective: str | None = None,
    healthy: bool = True,
    check: str = "auc-change",
) -> HistoryEntry:
    return HistoryEntry(
        snapshot_key=f"h{i}",
        created_at=NOW - timedelta(minutes=15 * (i + 1)),
        decision=decision,  # type: ignore[arg-type]
        effective_decision=(effective or decision),  # type: ignore[arg-type]
        healthy=healthy,
        values={} if value is None else {check: value},
    )


POLICY = """
models = ["shelf-ranker"]
[sample]
min_rows = 10
[[checks]]
name = "auc-change"
kind = "metric"
metric = "auc"
direction = "lower"
max_drop = 0.01
[checks.adaptive]
method = "robust-z"
k = 3.0
window = 30
min_history = 10
"""
# "lower is better" metric (think log loss) named auc-change for brevity: the change is bad
# when it rises, so the learned limit is an upper one.


def _judge(value_change: float, history: tuple[HistoryEntry, ...], policy_text: str = POLICY):
    policy = parse_policy(policy_text, name="t")
    base = _snap("b", {"auc": 0.5})
    cand = _snap("c", {"auc": 0.5 + value_change})
    verdict = evaluate(GateInput(candidate=cand, baseline=base, now=NOW, history=history), policy)
    return verdict, next(f for f in verdict.findings if f.check == "auc-change")


def test_learned_limit_is_median_plus_k_scaled_mad() -> None:
    rng = np.random.default_rng(3)
    values = rng.normal(0.0, 0.002, size=30)
    history = tuple(_entry(i, float(v)) for i, v in enumerate(values))
    # Reference: scipy.stats.median_abs_deviation(scale="normal") (Hampel identifier).
    expected = np.median(values) + 3.0 * sps.median_abs_deviation(values, scale="normal")
    verdict, finding = _judge(0.005, history)
    assert finding.limit == pytest.approx(expected, rel=1e-9)
    assert finding.details["adaptive"]["used"] is True
    # metric.py reports a "lower is better" metric's limit as +max_drop on the change.
    assert finding.details["adaptive"]["static_limit"] == pytest.approx(0.01)
    # 0.005 passes the static max_drop 0.01 but is far outside this quiet history.
    assert finding.outcome == "breach" and verdict.decision == "hold"
    assert "learned limit" in finding.message and "static limit" in finding.message


def test_noisy_history_widens_the_limit() -> None:
    values = np.random.default_rng(4).normal(0.0, 0.01, size=30)
    history = tuple(_entry(i, float(v)) for i, v in enumerate(values))
    verdict, finding = _judge(0.012, history)  # static limit would hold: worse by 0.012 > 0.01
    assert finding.limit is not None and finding.limit > 0.012
    assert finding.outcome == "ok" and verdict.decision == "promote"


def test_too_little_history_keeps_the_static_limit_and_says_so() -> None:
    history = tuple(_entry(i, 0.0) for i in range(5))
    verdict, finding = _judge(0.02, history)
    assert finding.outcome == "breach" and finding.limit == pytest.approx(0.01)
    assert "static limit kept" in finding.message and "only 5 healthy" in finding.message
    assert finding.details["adaptive"]["used"] is False


def test_unhealthy_history_is_excluded_and_counted() -> None:
    good = [_entry(i, 0.001 * (i % 3)) for i in range(10)]
    bad = [
        _entry(20, 0.5, decision="hold"),  # held
        _entry(21, 0.5, decision="hold", effective="promote"),  # overridden hold
        _entry(22, 0.5, healthy=False),  # rolled back later
        _entry(23, None),  # check did not report
    ]
    history = tuple(bad + good)
    _, finding = _judge(0.0, history)
    evidence = finding.details["adaptive"]
    assert evidence["history_used"] == 10
    assert evidence["excluded"] == {
        "held": 1,
        "overridden hold": 1,
        "not healthy": 1,
        "outside time window": 0,
        "no value": 1,
    }
    # The excluded 0.5 values would have dragged the limit up; it stays near the good ones.
    assert finding.limit is not None and finding.limit < 0.01


def test_include_overridden_lets_overridden_holds_count() -> None:
    history = tuple(
        [_entry(i, 0.001, decision="hold", effective="promote") for i in range(10)]
        + [_entry(10 + i, 0.001) for i in range(3)]
    )
    _, strict = _judge(0.0, history)
    assert strict.details["adaptive"]["used"] is False
    _, lenient = _judge(0.0, history, POLICY + "include_overridden = true\n")
    assert lenient.details["adaptive"]["history_used"] == 13


def test_window_hours_ignores_old_history() -> None:
    history = tuple(_entry(i, 0.001) for i in range(30))  # one every 15 min
    _, finding = _judge(0.0, history, POLICY + "window_hours = 2\n")
    # Entries created at 15 .. 120 minutes ago are inside two hours: 8 of them, fewer than 10.
    assert finding.details["adaptive"]["history_used"] == 8
    assert finding.details["adaptive"]["excluded"]["outside time window"] == 22


def test_higher_is_better_metric_gets_a_lower_limit() -> None:
    text = POLICY.replace('direction = "lower"', 'direction = "higher"')
    values = np.random.default_rng(5).normal(0.0, 0.001, size=30)
    history = tuple(_entry(i, float(v)) for i, v in enumerate(values))
    verdict, finding = _judge(-0.006, history, text)  # auc fell by 0.006 < max_drop 0.01
    expected = np.median(values) - 3.0 * sps.median_abs_deviation(values, scale="normal")
    assert finding.limit == pytest.approx(expected, rel=1e-9)
    assert finding.outcome == "breach" and "falls below" in finding.message
    _, rise = _judge(+0.006, history, text)
    assert rise.outcome == "ok"


def test_breach_for_another_reason_stays_a_breach() -> None:
    # The floor is not a limit the history can move.
    text = POLICY.replace(
        'direction = "lower"\nmax_drop = 0.01', 'direction = "higher"\nfloor = 0.9\nmax_drop = 0.5'
    )
    history = tuple(_entry(i, float(v)) for i, v in enumerate(np.linspace(-0.01, 0.01, 30)))
    _, finding = _judge(0.0, history, text)
    assert finding.outcome == "breach" and "below the floor" in finding.message


def test_quantile_method_and_limit_bounds() -> None:
    values = np.arange(1, 31) / 1000.0
    history = tuple(_entry(i, float(v)) for i, v in enumerate(values))
    text = POLICY.replace('method = "robust-z"', 'method = "quantile"\nquantile = 0.9')
    _, finding = _judge(0.0, history, text)
    assert finding.limit == pytest.approx(np.quantile(values, 0.9))
    _, capped = _judge(0.0, history, text + "max_limit = 0.01\n")
    assert capped.limit == pytest.approx(0.01) and "max_limit" in capped.message


def test_log_transform_learns_on_the_log_scale() -> None:
    values = np.random.default_rng(9).lognormal(np.log(0.01), 0.3, size=30)
    history = tuple(_entry(i, float(v)) for i, v in enumerate(values))
    _, finding = _judge(0.0, history, POLICY + 'transform = "log"\n')
    logs = np.log(values)
    expected = np.exp(np.median(logs) + 3.0 * sps.median_abs_deviation(logs, scale="normal"))
    assert finding.limit == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize(
    ("extra", "match"),
    [
        # Reference checks may learn now (the normal distance to a lagged reference is a
        # statistic like any other); a budget method without a [budget] section may not.
        ('[checks.adaptive]\nmethod = "budget"\n', r"needs a \[budget\] section"),
        ("[checks.adaptive]\nk = -1\n", "k"),
    ],
)
def test_adaptive_policy_errors(extra: str, match: str) -> None:
    text = (
        """
models = ["m"]
[[checks]]
name = "psi"
kind = "drift"
statistic = "psi"
max = 0.1
"""
        + extra
        + ("[checks.adaptive]\n" if "adaptive" not in extra else "")
    )
    with pytest.raises(PolicyError, match=match):
        parse_policy(text, name="bad")


def test_min_history_above_window_is_rejected() -> None:
    with pytest.raises(PolicyError, match="min_history must not exceed window"):
        parse_policy(POLICY.replace("min_history = 10", "min_history = 40"), name="bad")
