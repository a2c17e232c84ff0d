"""Training volume, baseline age, the stuck finding and the choice of reference."""

from __future__ import annotations

import dataclasses
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from scipy import stats as sps

from service.gate.evaluate import evaluate
from service.gate.history import consecutive_holds, format_age, stuck_state
from service.gate.policy import PolicyError, parse_policy
from service.gate.reference import Promotion, baseline_as_of, choose_reference
from service.gate.types import GateInput, HistoryEntry, Sample, Snapshot

NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)


def _snap(key: str, *, rows: int | None = None, trained_until: datetime | None = None) -> Snapshot:
    return Snapshot(
        model="shelf-ranker",
        key=key,
        rows_trained=rows,
        trained_until=trained_until,
        sample=Sample({"score": np.linspace(0.01, 0.99, 50)}),
    )


def _entry(
    i: int, *, rows: int | None = None, decision: str = "promote", effective: str | None = None
) -> HistoryEntry:
    return HistoryEntry(
        snapshot_key=f"h{i}",
        created_at=NOW - timedelta(minutes=15 * (i + 1)),
        decision=decision,  # type: ignore[arg-type]
        effective_decision=(effective or decision),  # type: ignore[arg-type]
        healthy=(effective or decision) == "promote",
        rows_trained=rows,
    )


def _policy(body: str = "", history: str = ""):
    text = f'models = ["shelf-ranker"]\n[sample]\nmin_rows = 10\n{history}\n{body}'
    return parse_policy(text, name="t")


VOLUME = """
[[checks]]
name = "volume"
kind = "training-volume"
k = 3.5
min_history = 10
"""


def _finding(verdict, check: str):
    return next(f for f in verdict.findings if f.check == check)


def test_training_volume_robust_z_matches_scipy_mad() -> None:
    rows = np.random.default_rng(1).normal(1_800_000, 40_000, size=40).round().astype(int)
    history = tuple(_entry(i, rows=int(r)) for i, r in enumerate(rows))
    cand = _snap("c", rows=180_000)  # a tenth of the usual rows: a broken partition
    verdict = evaluate(
        GateInput(candidate=cand, baseline=_snap("b"), now=NOW, history=history), _policy(VOLUME)
    )
    finding = _finding(verdict, "volume")
    # Reference: (x - median) / scipy.stats.median_abs_deviation(scale="normal").
    expected = (180_000 - np.median(rows)) / sps.median_abs_deviation(rows, scale="normal")
    assert finding.value == pytest.approx(expected, rel=1e-9)
    assert finding.outcome == "breach" and verdict.decision == "hold"
    usual = evaluate(
        GateInput(
            candidate=_snap("c", rows=int(np.median(rows)) + 20_000),
            baseline=_snap("b"),
            now=NOW,
            history=history,
        ),
        _policy(VOLUME),
    )
    assert _finding(usual, "volume").outcome == "ok"


def test_training_volume_side_and_static_fallback() -> None:
    history = tuple(_entry(i, rows=1000 + i) for i in range(3))
    body = VOLUME + "min_rows = 500\nmax_rows = 5000\n"
    low = evaluate(
        GateInput(candidate=_snap("c", rows=100), baseline=None, now=NOW, history=history),
        _policy(body),
    )
    finding = _finding(low, "volume")
    assert finding.outcome == "breach" and "below min_rows 500" in finding.message
    assert "only 3 healthy" in finding.message
    fine = evaluate(
        GateInput(candidate=_snap("c", rows=1000), baseline=None, now=NOW, history=history),
        _policy(body),
    )
    assert _finding(fine, "volume").outcome == "ok"
    none = evaluate(
        GateInput(candidate=_snap("c", rows=1000), baseline=None, now=NOW, history=history),
        _policy(VOLUME),
    )
    assert _finding(none, "volume").outcome == "skipped"
    many = tuple(_entry(i, rows=1000 + (i % 5)) for i in range(20))
    upper_only = VOLUME + 'side = "upper"\n'
    few_rows = evaluate(
        GateInput(candidate=_snap("c", rows=10), baseline=None, now=NOW, history=many),
        _policy(upper_only),
    )
    assert _finding(few_rows, "volume").outcome == "ok"


def test_held_history_does_not_count_for_volume() -> None:
    history = tuple(_entry(i, rows=10, decision="hold") for i in range(20)) + tuple(
        _entry(30 + i, rows=1000 + i) for i in range(12)
    )
    verdict = evaluate(
        GateInput(candidate=_snap("c", rows=10), baseline=None, now=NOW, history=history),
        _policy(VOLUME),
    )
    finding = _finding(verdict, "volume")
    assert finding.details["history_used"] == 12 and finding.details["excluded"]["held"] == 20
    assert finding.outcome == "breach"


AGE = """
[[checks]]
name = "baseline-age"
kind = "baseline-age"
max_age_hours = 6
"""


def test_baseline_age_is_advisory_by_default_and_blocking_on_request() -> None:
    base = _snap("b", trained_until=NOW - timedelta(hours=7))
    inp = GateInput(candidate=_snap("c"), baseline=base, now=NOW)
    verdict = evaluate(inp, _policy(AGE))
    finding = _finding(verdict, "baseline-age")
    assert finding.outcome == "advisory" and verdict.decision == "promote"
    assert "serving a baseline from 7 h ago" in finding.message
    blocking = evaluate(inp, _policy(AGE + "blocking = true\n"))
    assert _finding(blocking, "baseline-age").outcome == "breach" and blocking.decision == "hold"
    fresh = GateInput(
        candidate=_snap("c"), baseline=_snap("b", trained_until=NOW - timedelta(hours=1)), now=NOW
    )
    assert _finding(evaluate(fresh, _policy(AGE)), "baseline-age").outcome == "ok"


def test_baseline_age_from_promotion_time() -> None:
    inp = GateInput(
        candidate=_snap("c"), baseline=_snap("b"), now=NOW, baseline_since=NOW - timedelta(hours=30)
    )
    finding = _finding(evaluate(inp, _policy(AGE + 'age_from = "promotion"\n')), "baseline-age")
    assert finding.value == pytest.approx(30.0) and "30 h ago" in finding.message


def test_stuck_after_repeated_holds_is_advisory_on_every_verdict() -> None:
    holds = tuple(_entry(i, decision="hold") for i in range(4)) + (_entry(9),)
    inp = GateInput(
        candidate=_snap("c"),
        baseline=_snap("b"),
        now=NOW,
        history=holds,
        baseline_since=NOW - timedelta(hours=6),
    )
    verdict = evaluate(inp, _policy())
    # a promote ends the run of holds: not stuck any more, and the finding is not repeated
    assert verdict.decision == "promote"  # advisory only
    assert not [f for f in verdict.findings if f.check == "history.stuck"]
    few = Snapshot(model="shelf-ranker", key="c", sample=Sample({"score": np.full(5, 0.5)}))
    held_inp = dataclasses.replace(inp, candidate=few)  # 5 rows, fewer than min_rows: held
    held = evaluate(held_inp, _policy())
    assert held.decision == "hold"
    stuck = _finding(held, "history.stuck")
    assert stuck.outcome == "advisory" and not stuck.blocking
    # counted with this verdict, as the model list counts: 4 before it and itself
    assert stuck.message == "stuck: 5 holds in a row; serving a baseline from 6 h ago"
    assert stuck.value == 5
    quiet = evaluate(held_inp, _policy(history="[history]\nstuck_after_holds = 6\n"))
    assert not [f for f in quiet.findings if f.check == "history.stuck"]
    off = evaluate(held_inp, _policy(history="[history]\nstuck_after_holds = 0\n"))
    assert not [f for f in off.findings if f.check == "history.stuck"]


def test_an_override_to_promote_ends_the_run_of_holds() -> None:
    history = (
        _entry(0, decision="hold"),
        _entry(1, decision="hold", effective="promote"),
        _entry(2, decision="hold"),
    )
    assert consecutive_holds(history) == 1


@pytest.mark.parametrize(
    ("seconds", "text"),
    [
        (30, "30 s"),
        (25 * 60, "25 min"),
        (6 * 3600, "6 h"),
        (7.5 * 3600, "7.5 h"),
        (3 * 86400, "3 d"),
    ],
)
def test_format_age(seconds: float, text: str) -> None:
    assert format_age(seconds) == text


def test_stuck_state_without_baseline() -> None:
    state = stuck_state(5, threshold=4, baseline_since=None, now=NOW)
    assert state.stuck and state.message == "stuck: 5 holds in a row; no baseline yet"


def test_reference_pinned_wins_then_lag_then_none() -> None:
    promotions = [Promotion(f"s{i}", NOW - timedelta(hours=10 - i)) for i in range(10)]
    assert baseline_as_of(promotions, NOW - timedelta(hours=6)) == "s4"
    assert baseline_as_of(promotions, NOW - timedelta(hours=6, minutes=1)) == "s3"
    pinned = choose_reference(pinned="s1", lag_hours=6, promotions=promotions, now=NOW)
    assert (pinned.snapshot_key, pinned.source) == ("s1", "pinned")
    lag = choose_reference(pinned=None, lag_hours=6, promotions=promotions, now=NOW)
    assert (lag.snapshot_key, lag.source) == ("s4", "lag")
    too_young = choose_reference(pinned=None, lag_hours=48, promotions=promotions, now=NOW)
    assert too_young.snapshot_key is None and "no baseline 48 h ago" in too_young.message
    assert (
        choose_reference(pinned=None, lag_hours=None, promotions=promotions, now=NOW).source
        == "none"
    )


@pytest.mark.parametrize(
    ("body", "match"),
    [
        (AGE + 'against = "reference"\n', "baseline-age measures the baseline"),
        (VOLUME + "window = 5\n", "min_history must not exceed window"),
        (VOLUME + "[checks.adaptive]\n", "learns from history already"),
        ("[history]\nstuck_after_holds = -1\n", "stuck_after_holds"),
        ("[reference]\nlag_hours = 0\n", "lag_hours"),
    ],
)
def test_history_policy_errors(body: str, match: str) -> None:
    with pytest.raises(PolicyError, match=match):
        _policy(body)


def test_history_depth_covers_the_widest_window() -> None:
    policy = _policy(VOLUME + "window = 120\n")
    assert policy.history_depth() == 480
    assert _policy().history_depth() == 50
