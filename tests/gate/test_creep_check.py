"""The creep check: paired steps summed along the promotion chain (issue 9, item 4)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from scipy.special import logit

from service.gate.checks import CheckContext
from service.gate.checks.creep import CreepConfig, run_creep
from service.gate.history import learn_key
from service.gate.policy import parse_policy
from service.gate.types import HistoryEntry, Sample, Snapshot

NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)
BUDGET = """
models = ["*"]
[reference]
lag_hours = 6
[budget]
false_holds_per_1000 = 1
min_history = 20
[[checks]]
name = "c"
kind = "creep"
statistic = "mean_logit"
max = 0.5
"""
NO_BUDGET = BUDGET.replace("[budget]\nfalse_holds_per_1000 = 1\nmin_history = 20\n", "")


def candidate(shift: float = 0.0, spread: float = 1.0, seed: int = 3) -> Snapshot:
    rng = np.random.default_rng(seed)
    base_logit = rng.normal(-1.5, 1.0, 4000)
    cand_logit = base_logit * spread + shift + rng.normal(0, 0.05, 4000)
    sample = Sample(
        {
            "score": 1 / (1 + np.exp(-cand_logit)),
            "baseline_score": 1 / (1 + np.exp(-base_logit)),
        }
    )
    return Snapshot(model="m", key="cand", trained_until=NOW, sample=sample)


def entry(
    i: int, step: float, *, healthy: bool = True, total: float | None = None, below: int = 0
) -> HistoryEntry:
    """The verdict of the push trained 15 x *i* minutes before NOW; *below*: its baseline was
    the push *below* (0: not recorded)."""
    values = {learn_key("c", "step"): step}
    if below:
        values[learn_key("c", "baseline_until")] = (NOW - timedelta(minutes=15 * below)).timestamp()
    if total is not None:
        values[learn_key("c", "sum")] = total
    return HistoryEntry(
        snapshot_key=f"s{i}",
        created_at=NOW - timedelta(minutes=15 * i),
        decision="promote" if healthy else "hold",
        effective_decision="promote" if healthy else "hold",
        healthy=healthy,
        trained_until=NOW - timedelta(minutes=15 * i),
        values=values,
    )


def run(  # type: ignore[no-untyped-def]
    policy_text: str,
    cand: Snapshot,
    history: list[HistoryEntry],
    baseline: Snapshot | None = None,
    **keys: object,
):
    policy = parse_policy(policy_text, name="p")
    config = policy.checks[0]
    if keys:
        config = CreepConfig.model_validate({**config.model_dump(), **keys})
    assert isinstance(config, CreepConfig)
    ctx = CheckContext(
        candidate=cand,
        other=None,
        baseline=baseline,
        reference=None,
        history=tuple(history),
        now=NOW,
        policy=policy,
    )
    (finding,) = run_creep(config, ctx)
    return finding


def test_the_step_is_the_paired_mean_logit_change_and_the_chain_telescopes() -> None:
    cand = candidate(shift=0.03)
    sample = cand.sample
    assert sample is not None
    # scipy's logit is the outside reference for the step.
    expected = float(np.mean(logit(sample.score) - logit(sample.columns["baseline_score"])))
    history = [entry(i, 0.01) for i in range(1, 30)]  # 15-minute pushes
    history[3] = entry(4, 0.5, healthy=False)  # a held snapshot never joined the chain
    finding = run(NO_BUDGET, cand, history)
    assert finding.details["step"] == pytest.approx(expected, rel=1e-12)
    # 6 h = 24 pushes: entries 1..23 lie strictly inside the window, one of them held.
    assert finding.details["chain_steps"] == 22
    assert finding.value == pytest.approx(expected + 22 * 0.01, rel=1e-12)
    assert finding.outcome == "ok"  # 0.25 < static 0.5
    assert run(NO_BUDGET, candidate(shift=0.3), history).outcome == "breach"  # 0.52 > 0.5
    # With the baselines recorded, the chain is walked from the baseline down: 1 -> 2 -> 3 -> 5
    # (4 was held, so 5 was 3's baseline) -> 6 ... -> 23; 24 is 6 h back, outside.
    linked = [entry(i, 0.01, below=i + 1 if i != 3 else 5) for i in range(1, 30)]
    linked[3] = entry(4, 0.5, healthy=False)
    baseline = Snapshot(model="m", key="s1", trained_until=NOW - timedelta(minutes=15))
    assert run(NO_BUDGET, cand, linked, baseline=baseline).details["chain_steps"] == 22
    # After a rollback to the snapshot trained 2 h ago (8), the promotions after it (1-7) are
    # not its ancestors: the chain is 8 ... 23.
    rolled_back_to = Snapshot(model="m", key="s8", trained_until=NOW - timedelta(hours=2))
    finding = run(NO_BUDGET, cand, linked, baseline=rolled_back_to)
    assert finding.details["chain_steps"] == 16
    assert finding.details["learn"]["baseline_until"] == (NOW - timedelta(hours=2)).timestamp()


def test_log_spread_against_numpy() -> None:
    cand = candidate(spread=1.2)
    sample = cand.sample
    assert sample is not None
    s, b = logit(sample.score), logit(sample.columns["baseline_score"])
    finding = run(NO_BUDGET, cand, [], statistic="log_spread")
    assert finding.details["step"] == pytest.approx(np.log(np.std(s) / np.std(b)), rel=1e-12)


def test_learned_two_sided_limit_after_warm_up() -> None:
    rng = np.random.default_rng(8)
    # Healthy sums scattered with sd 0.02 around 0, trained 6 h (24 pushes) or more before the
    # candidate (sums inside the window are not learned from); steps 0 in the window.
    history = [entry(i, 0.0) for i in range(1, 25)] + [
        entry(i, 0.0, total=float(x)) for i, x in enumerate(rng.normal(0, 0.02, 60), 25)
    ]
    ok = run(BUDGET, candidate(shift=0.03), history)
    assert ok.outcome == "ok" and set(ok.details["bounds"]) == {"upper", "lower"}
    upper = ok.details["bounds"]["upper"]
    # 1 in 2,000 per side (the whole budget of the single check, split between the tails):
    # about 3.5 sd of a normal (scipy.stats.norm.ppf(1 - 1/2000) = 3.29) widened for 60 values.
    assert 0.06 < upper < 0.11
    assert run(BUDGET, candidate(shift=0.15), history).outcome == "breach"
    assert run(BUDGET, candidate(shift=-0.15), history).outcome == "breach"
    # Warm-up: with 10 healthy sums the static 0.5 holds, so 0.15 passes.
    warm = run(BUDGET, candidate(shift=0.15), history[:34])
    assert warm.outcome == "ok" and "warm-up" in warm.message
    # Sums inside the window are never learned from: a creep cannot widen its own limit.
    inside = [entry(i, 0.0, total=0.3 * (-1) ** i) for i in range(1, 24)] + history[23:]
    assert run(BUDGET, candidate(shift=0.03), inside).details["bounds"] == ok.details["bounds"]


def test_without_baseline_scores_or_window_it_is_skipped() -> None:
    bare = Snapshot(model="m", key="c", trained_until=NOW, sample=Sample({"score": np.ones(10)}))
    assert run(NO_BUDGET, bare, []).outcome == "skipped"
    no_lag = NO_BUDGET.replace("[reference]\nlag_hours = 6\n", "")
    assert run(no_lag, candidate(), []).outcome == "skipped"
    assert run(no_lag, candidate(), [], hours=2.0).outcome == "ok"
