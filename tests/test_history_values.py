"""The compact per-finding numbers (``finding_values``, issue 10 item 4): written with each
verdict, filled for older verdicts by migration 0002, and giving the gate exactly the history
(and so the learned limits) that decoding every stored finding gave."""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from service import intake, operate
from service.gate.adaptive import learn_limit
from service.gate.history import history_values as gate_history_values
from service.gate.policy import parse_policy
from service.gate.types import Finding, HistoryEntry, Sample, Verdict
from service.settings import Settings
from service.store import db as store_db
from service.store import history_values, repo
from service.store.tables import FindingValueRow, OverrideRow, PromotionRow, SnapshotRow, VerdictRow

POLICY = parse_policy(
    """
models = ["*"]
first_snapshot = "promote-if-healthy"

[sample]
min_rows = 50

[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
bins = 5
max = 0.5
[checks.adaptive]
transform = "log"
window = 20
min_history = 5

[[checks]]
name = "score-ks"
kind = "drift"
statistic = "ks"
max = 0.5
[checks.adaptive]
method = "quantile"
quantile = 0.9
window = 20
min_history = 5

[[checks]]
name = "auc-vs-baseline"
kind = "quality"
metric = "auc"
rule = "non-inferiority"
margin = 0.2
""",
    name="compact",
)

T0 = datetime(2026, 12, 1, tzinfo=UTC)


def sample(seed: int, shift: float) -> Sample:
    """Invented home-shelf scores of the demo bookshop with labels (seeded)."""
    rng = np.random.default_rng(seed)
    label = (rng.random(400) < 0.3).astype(np.float64)
    score = np.clip(rng.beta(2.0, 5.0, 400) + 0.2 * label + shift, 0.0, 1.0)
    return Sample({"score": score, "label": label})


def post(session: Session, i: int, shift: float) -> intake.Submitted:
    return intake.submit(
        session,
        model_name="shelf-ranker",
        post=intake.SnapshotPost(key=f"s{i:02d}", content_digest=f"d{i}", sample=sample(i, shift)),
        policies=[POLICY],
        now=T0 + timedelta(minutes=15 * i),
    )


def decoded_history(session: Session, model_id: int, limit: int) -> tuple[HistoryEntry, ...]:
    """The history as it was built before finding_values: every verdict's findings decoded."""
    rows = session.execute(
        select(VerdictRow, SnapshotRow)
        .join(SnapshotRow, SnapshotRow.id == VerdictRow.snapshot_id)
        .where(VerdictRow.model_id == model_id)
        .order_by(VerdictRow.id.desc())
        .limit(limit)
    ).all()
    promotions = session.scalars(select(PromotionRow)).all()
    ever = {p.snapshot_id for p in promotions}
    rolled = {p.previous_id for p in promotions if p.cause == "rollback"}
    out = []
    for verdict, snap in rows:
        overrides = session.scalars(
            select(OverrideRow).where(OverrideRow.verdict_id == verdict.id).order_by(OverrideRow.id)
        ).all()
        effective = overrides[-1].decision if overrides else verdict.decision
        out.append(
            HistoryEntry(
                snapshot_key=snap.key,
                created_at=repo.utc(verdict.created_at),  # type: ignore[arg-type]
                decision=verdict.decision,  # type: ignore[arg-type]
                effective_decision=effective,  # type: ignore[arg-type]
                healthy=effective == "promote" and snap.id in ever and snap.id not in rolled,
                rows_trained=snap.rows_trained,
                trained_until=repo.utc(snap.trained_until),
                # the gate's own rule for the values of a stored verdict
                values=gate_history_values(verdict.findings),
            )
        )
    return tuple(out)


def stored_rows(session: Session) -> list[dict[str, Any]]:
    rows = session.execute(
        select(FindingValueRow.__table__).order_by(
            FindingValueRow.verdict_id, FindingValueRow.position
        )
    ).all()
    return [{k: v for k, v in r._mapping.items() if k != "id"} for r in rows]


def expected_rows(session: Session) -> list[dict[str, Any]]:
    out: list[dict[str, Any]] = []
    for verdict in session.scalars(select(VerdictRow).order_by(VerdictRow.id)):
        out.extend(
            history_values.rows_for(
                verdict_id=verdict.id, model_id=verdict.model_id, findings=verdict.findings
            )
        )
    return out


def limits(history: Sequence[HistoryEntry], now: datetime) -> list[float | None]:
    found = []
    for check in POLICY.checks:
        if check.adaptive is not None:
            learned = learn_limit(
                check.adaptive,
                check=check.name,
                side=check.adaptive_side(),
                history=history,
                now=now,
            )
            found.append(learned.limit)
    return found


def test_compact_history_equals_decoded_findings_and_survives_migration(
    database_url: str,
) -> None:
    settings = Settings(database_url=database_url)
    engine = store_db.make_engine(settings)
    factory = store_db.make_sessionmaker(engine)
    shifts = [0.0] * 30
    shifts[7] = shifts[18] = 0.45  # held by the PSI limit
    with store_db.transaction(factory) as session:
        for i, shift in enumerate(shifts):
            post(session, i, shift)
    with store_db.transaction(factory) as session:
        held = session.scalars(
            select(VerdictRow).where(VerdictRow.decision == "hold").order_by(VerdictRow.id)
        ).first()
        assert held is not None
        operate.override_verdict(
            session,
            verdict_id=held.id,
            decision="promote",
            reason="checked by hand",
            actor="on-call",
            now=T0 + timedelta(days=1),
        )
        operate.rollback(
            session,
            model_name="shelf-ranker",
            key="s25",
            reason="bad push",
            actor="on-call",
            now=T0 + timedelta(days=1, minutes=1),
        )
        # A finding that reports further quantities to learn from (and junk to drop).
        verdict = Verdict(
            decision="promote",
            reasons=(),
            findings=(
                Finding(
                    check="segment-gap",
                    kind="quality",
                    outcome="ok",
                    message="",
                    statistic="auc change",
                    value=0.01,
                    limit=-0.02,
                    pvalue=0.3,
                    baseline_value=0.7,
                    candidate_value=0.71,
                    interval=(-0.01, 0.03),
                    details={"learn": {"worst_segment": -0.004, "bad": math.nan, "text": "x"}},
                ),
            ),
            policy_name="compact",
            policy_digest="x",
            baseline_key=None,
        )
        model = repo.get_model(session, name="shelf-ranker")
        assert model is not None
        extra = repo.add_snapshot(
            session,
            model_id=model.id,
            key="extra",
            parent=None,
            trained_until=None,
            code_version=None,
            rows_trained=None,
            metrics={},
            tags={},
            content_digest="e",
            sample=None,
            now=T0 + timedelta(days=1, minutes=2),
        )
        learn_row = repo.add_verdict(
            session,
            model_id=model.id,
            snapshot_id=extra.id,
            baseline_id=None,
            reference_id=None,
            verdict=verdict,
            duration_ms=1.0,
            now=T0 + timedelta(days=1, minutes=2),
        )
    now = T0 + timedelta(days=2)
    with store_db.read_transaction(factory) as session:
        model = repo.get_model(session, name="shelf-ranker")
        assert model is not None
        model_id = model.id
        live = stored_rows(session)
        assert live == expected_rows(session)
        assert len(live) >= 30 * 4  # health, psi, ks, auc at least
        compact = repo.history(session, model_id=model_id, limit=200)
        decoded = decoded_history(session, model_id, 200)
        assert compact == decoded
        assert {e.healthy for e in compact} == {True, False}  # holds and a rollback count
        learned = limits(compact, now)
        assert learned == limits(decoded, now)
        assert all(limit is not None for limit in learned), learned
        # A history that starts before a verdict (replay) agrees as well.
        assert (
            repo.history(session, model_id=model_id, limit=10, before_id=learn_row.id)
            == (decoded[1:11])
        )
        found = history_values.quantities(session, model_id=model_id, verdict_ids=[learn_row.id])
        (q,) = found[learn_row.id]
        assert q.learn == {"worst_segment": -0.004}
        assert (q.value, q.limit, q.pvalue, q.interval) == (0.01, -0.02, 0.3, (-0.01, 0.03))
        assert (q.baseline_value, q.candidate_value, q.statistic) == (0.7, 0.71, "auc change")
    engine.dispose()

    # Down to 0001 (the table goes) and up again: the migration fills it from the findings.
    store_db.downgrade(settings, "0001")
    store_db.upgrade(settings)
    engine = store_db.make_engine(settings)
    factory = store_db.make_sessionmaker(engine)
    with store_db.read_transaction(factory) as session:
        assert stored_rows(session) == live
        assert repo.history(session, model_id=model_id, limit=200) == compact
        assert limits(repo.history(session, model_id=model_id, limit=200), now) == learned
    engine.dispose()


def test_trend_findings_carry_what_the_trends_read(database_url: str) -> None:
    settings = Settings(database_url=database_url)
    engine = store_db.make_engine(settings)
    factory = store_db.make_sessionmaker(engine)
    with store_db.transaction(factory) as session:
        for i in range(3):
            post(session, i, 0.0)
    with store_db.read_transaction(factory) as session:
        verdicts = session.scalars(select(VerdictRow).order_by(VerdictRow.id)).all()
        numbers = history_values.trend_findings(
            session, model_id=verdicts[0].model_id, verdict_ids=[v.id for v in verdicts]
        )
        keys = ("check", "kind", "statistic", "outcome", "value", "limit", "baseline_value")
        for verdict in verdicts:
            assert [{k: f[k] for k in keys} for f in numbers[verdict.id]] == [
                {k: f.get(k) for k in keys} for f in verdict.findings
            ]
    engine.dispose()
