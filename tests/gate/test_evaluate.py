"""The decision: health, lineage, drift, reported metrics, fail closed, first snapshot."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from service.gate.checks import REGISTRY
from service.gate.evaluate import evaluate
from service.gate.policy import parse_policy
from service.gate.types import GateInput, Sample, Snapshot

NOW = datetime(2026, 12, 1, 3, 0, tzinfo=UTC)
POLICY = parse_policy(
    """
models = ["*"]
[sample]
min_rows = 100
[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
max = 0.1
[[checks]]
name = "auc"
kind = "metric"
metric = "auc"
direction = "higher"
max_drop = 0.01
floor = 0.6
""",
    name="t",
)


def snap(key: str, scores: np.ndarray, *, auc: float = 0.8, hours: float = 0.0) -> Snapshot:
    return Snapshot(
        model="m",
        key=key,
        trained_until=NOW - timedelta(hours=1) + timedelta(hours=hours),
        metrics={"auc": auc},
        sample=Sample({"score": np.asarray(scores, dtype=float)}),
    )


def rng_scores(seed: int, n: int = 2000, shift: float = 0.0) -> np.ndarray:
    return np.clip(np.random.default_rng(seed).beta(2, 5, n) + shift, 0, 1)


def outcome(verdict, check: str) -> str:  # type: ignore[no-untyped-def]
    return next(f.outcome for f in verdict.findings if f.check == check)


def test_healthy_candidate_is_promoted_and_moves_baseline() -> None:
    v = evaluate(
        GateInput(snap("c", rng_scores(1), hours=1), snap("b", rng_scores(2)), NOW), POLICY
    )
    assert v.decision == "promote" and v.reasons == () and v.moves_baseline
    assert outcome(v, "score-psi") == "ok"


def test_drift_holds_with_reason() -> None:
    v = evaluate(
        GateInput(snap("c", rng_scores(1, shift=0.2), hours=1), snap("b", rng_scores(2)), NOW),
        POLICY,
    )
    assert v.decision == "hold"
    assert v.reasons[0].startswith("score PSI")
    finding = next(f for f in v.findings if f.check == "score-psi")
    assert finding.value is not None and finding.value > 0.1 and finding.limit == 0.1
    assert finding.pvalue is not None and finding.pvalue < 1e-6


def test_metric_drop_and_floor() -> None:
    base = snap("b", rng_scores(2), auc=0.80)
    v = evaluate(GateInput(snap("c", rng_scores(2), auc=0.785, hours=1), base, NOW), POLICY)
    assert v.decision == "hold"
    assert "worse by 0.015" in v.reasons[0]
    # within tolerance
    v = evaluate(GateInput(snap("c", rng_scores(2), auc=0.795, hours=1), base, NOW), POLICY)
    assert v.decision == "promote"
    # the floor applies without a baseline
    v = evaluate(GateInput(snap("c", rng_scores(2), auc=0.55), None, NOW), POLICY)
    assert v.decision == "hold" and "below the floor 0.6" in v.reasons[0]


def test_nonfinite_scores_are_a_health_breach_listed_first() -> None:
    scores = rng_scores(3)
    scores[:20] = np.nan
    scores[20] = np.inf
    v = evaluate(GateInput(snap("c", scores, hours=1), snap("b", rng_scores(2)), NOW), POLICY)
    assert v.decision == "hold"
    assert v.reasons[0].startswith("21 of 2000 scores are NaN, infinite or missing")
    assert outcome(v, "health.non-finite") == "breach"


@pytest.mark.parametrize(
    ("scores", "check"),
    [
        (np.full(500, 0.31), "health.collapse"),
        (np.concatenate([np.full(400, 1.0), np.linspace(0, 1, 100)]), "health.saturation"),
        (np.linspace(-0.5, 1.5, 500), "health.range"),
        (np.linspace(0, 1, 50), "health.rows"),
    ],
)
def test_health_breaches(scores: np.ndarray, check: str) -> None:
    v = evaluate(GateInput(snap("c", scores), None, NOW), POLICY)
    assert v.decision == "hold"
    assert outcome(v, check) == "breach"


def test_stale_watermark_holds() -> None:
    v = evaluate(
        GateInput(snap("c", rng_scores(1), hours=-2), snap("b", rng_scores(1)), NOW), POLICY
    )
    assert v.decision == "hold" and v.reasons[0].startswith("stale candidate")


def test_first_snapshot_rules() -> None:
    cand = snap("c", rng_scores(1))
    v = evaluate(GateInput(cand, None, NOW), POLICY)
    assert v.decision == "promote"
    assert outcome(v, "score-psi") == "skipped"
    holding = parse_policy(
        'models = ["*"]\nfirst_snapshot = "hold"\n[sample]\nmin_rows = 10\n', name="h"
    )
    v = evaluate(GateInput(cand, None, NOW), holding)
    assert v.decision == "hold" and "first snapshot" in v.reasons[0]


def test_advisory_check_does_not_hold() -> None:
    policy = parse_policy(
        'models = ["*"]\n[sample]\nmin_rows = 10\n[[checks]]\nname = "p"\nkind = "drift"\n'
        'statistic = "psi"\nmax = 0.1\nblocking = false\n',
        name="a",
    )
    v = evaluate(
        GateInput(snap("c", rng_scores(1, shift=0.3), hours=1), snap("b", rng_scores(2)), NOW),
        policy,
    )
    assert v.decision == "promote" and outcome(v, "p") == "advisory"


def test_a_failing_check_fails_closed(monkeypatch: pytest.MonkeyPatch) -> None:
    spec = REGISTRY["drift"]

    def boom(config, ctx):  # type: ignore[no-untyped-def]
        raise RuntimeError("disk on fire")

    monkeypatch.setitem(REGISTRY, "drift", type(spec)(spec.kind, spec.family, spec.config, boom))
    v = evaluate(
        GateInput(snap("c", rng_scores(1), hours=1), snap("b", rng_scores(1)), NOW), POLICY
    )
    assert v.decision == "hold"
    assert v.reasons[0] == "check 'score-psi' failed: RuntimeError: disk on fire"


def test_no_policy_holds() -> None:
    v = evaluate(GateInput(snap("c", rng_scores(1)), None, NOW), None)
    assert v.decision == "hold" and v.error is not None


def test_reference_check_skipped_without_reference() -> None:
    policy = parse_policy(
        'models = ["*"]\n[sample]\nmin_rows = 10\n[[checks]]\nname = "creep"\nkind = "drift"\n'
        'statistic = "ks"\nmax = 0.1\nagainst = "reference"\n',
        name="r",
    )
    v = evaluate(
        GateInput(snap("c", rng_scores(1), hours=1), snap("b", rng_scores(1)), NOW), policy
    )
    assert outcome(v, "creep") == "skipped"
    v = evaluate(
        GateInput(
            snap("c", rng_scores(1, shift=0.3), hours=1),
            snap("b", rng_scores(1)),
            NOW,
            reference=snap("r", rng_scores(4)),
        ),
        policy,
    )
    assert outcome(v, "creep") == "breach"
    assert next(f for f in v.findings if f.check == "creep").against == "reference"
