"""Repository functions: every read and write of the tables goes through here.

All functions are keyword-only, take the request's session and never commit: the caller's
transaction commits once (see :func:`service.store.db.transaction`).
"""

from __future__ import annotations

import base64
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import Select, exists, func, or_, select
from sqlalchemy.dialects.postgresql import insert as pg_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlalchemy.orm import Session, defer

from service.gate.policy import Policy
from service.gate.types import HistoryEntry, Sample, SampleSummary, Snapshot, Verdict
from service.store import codec, history_values
from service.store.tables import (
    AuditRow,
    ModelRow,
    OverrideRow,
    PolicyRow,
    PromotionRow,
    SampleColumnRow,
    ServiceKeyRow,
    SnapshotRow,
    VerdictRow,
)


def utc(value: datetime | None) -> datetime | None:
    """Attach UTC to a naive datetime read back from SQLite; convert aware ones to UTC."""
    if value is None:
        return None
    if value.tzinfo is None:
        return value.replace(tzinfo=UTC)
    return value.astimezone(UTC)


# --- models -------------------------------------------------------------------------------


def get_model(session: Session, *, name: str, lock: bool = False) -> ModelRow | None:
    """The model called *name*; with ``lock`` its row is locked until commit (PostgreSQL
    ``FOR UPDATE``; SQLite transactions already hold the write lock from BEGIN IMMEDIATE).

    With ``lock`` the row's values are read afresh inside the lock, even when the session
    already holds the row from an earlier, unlocked read (the session would otherwise keep
    its cached baseline, replaced since by another writer: a broken chain)."""
    stmt = select(ModelRow).where(ModelRow.name == name)
    if lock:
        stmt = stmt.with_for_update().execution_options(populate_existing=True)
    return session.scalars(stmt).one_or_none()


def _insert_if_absent(session: Session, table: type[Any], key: str, values: dict[str, Any]) -> None:
    """Insert a row unless one with the same unique *key* exists; safe when two transactions
    race (``INSERT ... ON CONFLICT DO NOTHING`` on PostgreSQL and SQLite)."""
    dialect = session.get_bind().dialect.name
    if dialect in {"postgresql", "sqlite"}:
        insert = pg_insert if dialect == "postgresql" else sqlite_insert
        session.execute(insert(table).values(**values).on_conflict_do_nothing(index_elements=[key]))
        return
    column = getattr(table, key)  # pragma: no cover - other dialects
    if session.scalars(select(column).where(column == values[key])).first() is None:
        session.add(table(**values))
        session.flush()


def get_or_create_model(session: Session, *, name: str, now: datetime) -> ModelRow:
    """The model called *name*, created if new, locked for the rest of the transaction."""
    _insert_if_absent(session, ModelRow, "name", {"name": name, "created_at": now})
    model = get_model(session, name=name, lock=True)
    assert model is not None
    return model


def list_model_rows(session: Session) -> Sequence[ModelRow]:
    return session.scalars(select(ModelRow).order_by(ModelRow.name)).all()


# --- snapshots and samples ----------------------------------------------------------------


def get_snapshot(session: Session, *, model_id: int, key: str) -> SnapshotRow | None:
    return session.scalars(
        select(SnapshotRow).where(SnapshotRow.model_id == model_id, SnapshotRow.key == key)
    ).one_or_none()


def snapshot_by_id(session: Session, *, snapshot_id: int | None) -> SnapshotRow | None:
    return None if snapshot_id is None else session.get(SnapshotRow, snapshot_id)


def add_snapshot(
    session: Session,
    *,
    model_id: int,
    key: str,
    parent: str | None,
    trained_until: datetime | None,
    code_version: str | None,
    rows_trained: int | None,
    metrics: dict[str, float],
    tags: dict[str, str],
    content_digest: str,
    sample: Sample | None,
    now: datetime,
    text_codes: Mapping[str, codec.Factorized] | None = None,
) -> SnapshotRow:
    """Insert a snapshot with its sample columns (compressed) and the score summary.
    *text_codes* may hold the text columns' (codes, distinct values) already computed."""
    row = SnapshotRow(
        model_id=model_id,
        key=key,
        parent_key=parent,
        trained_until=trained_until,
        code_version=code_version,
        rows_trained=rows_trained,
        metrics=metrics,
        tags=tags,
        content_digest=content_digest,
        sample_rows=0 if sample is None else len(sample),
        summary=None if sample is None else codec.summarise(sample.score).to_dict(),
        created_at=now,
    )
    session.add(row)
    session.flush()
    if sample is not None:
        for name, codec_name, length, data in codec.encode_sample(sample, text_codes):
            session.add(
                SampleColumnRow(
                    snapshot_id=row.id, name=name, codec=codec_name, length=length, data=data
                )
            )
        session.flush()
    return row


def load_sample(session: Session, *, snapshot_id: int) -> Sample | None:
    rows = session.execute(
        select(
            SampleColumnRow.name,
            SampleColumnRow.codec,
            SampleColumnRow.length,
            SampleColumnRow.data,
        ).where(SampleColumnRow.snapshot_id == snapshot_id)
    ).all()
    if not rows:
        return None
    return codec.decode_sample({name: (c, n, data) for name, c, n, data in rows})


def sample_column_names(session: Session, *, snapshot_id: int) -> list[str]:
    """The names of a snapshot's stored sample columns, sorted (nothing is decoded)."""
    return sorted(
        session.scalars(
            select(SampleColumnRow.name).where(SampleColumnRow.snapshot_id == snapshot_id)
        ).all()
    )


def to_gate_snapshot(
    session: Session, *, row: SnapshotRow, model_name: str, with_sample: bool = True
) -> Snapshot:
    """The gate's view of a stored snapshot (sample decoded when asked and not pruned)."""
    return Snapshot(
        model=model_name,
        key=row.key,
        parent=row.parent_key,
        trained_until=utc(row.trained_until),
        code_version=row.code_version,
        rows_trained=row.rows_trained,
        metrics=dict(row.metrics or {}),
        tags=dict(row.tags or {}),
        sample=load_sample(session, snapshot_id=row.id) if with_sample else None,
        summary=SampleSummary.from_dict(row.summary) if row.summary else None,
        created_at=utc(row.created_at),
    )


def known_keys(session: Session, *, model_id: int, among: Sequence[str]) -> frozenset[str]:
    """Which of the keys *among* are stored snapshots of the model (one indexed query; the
    model's whole key list grows without bound and is never needed)."""
    if not among:
        return frozenset()
    return frozenset(
        session.scalars(
            select(SnapshotRow.key).where(
                SnapshotRow.model_id == model_id, SnapshotRow.key.in_(list(among))
            )
        ).all()
    )


# --- policies -----------------------------------------------------------------------------


def record_policy(session: Session, *, policy: Policy, now: datetime) -> None:
    """Keep the exact text of *policy* by digest (once). Posts for different models do not
    lock each other, so two may record the same policy at once: insert-if-absent."""
    _insert_if_absent(
        session,
        PolicyRow,
        "digest",
        {"name": policy.name, "digest": policy.digest, "text": policy.text, "first_seen_at": now},
    )


# --- verdicts -----------------------------------------------------------------------------


def add_verdict(
    session: Session,
    *,
    model_id: int,
    snapshot_id: int,
    baseline_id: int | None,
    reference_id: int | None,
    verdict: Verdict,
    duration_ms: float,
    now: datetime,
) -> VerdictRow:
    row = VerdictRow(
        model_id=model_id,
        snapshot_id=snapshot_id,
        baseline_id=baseline_id,
        reference_id=reference_id,
        decision=verdict.decision,
        reasons=list(verdict.reasons),
        findings=[f.to_dict() for f in verdict.findings],
        policy_name=verdict.policy_name,
        policy_digest=verdict.policy_digest,
        error=verdict.error,
        moved_baseline=False,
        duration_ms=duration_ms,
        created_at=now,
    )
    session.add(row)
    session.flush()
    history_values.add(session, verdict_id=row.id, model_id=model_id, findings=row.findings)
    return row


def verdict_for_snapshot(session: Session, *, snapshot_id: int) -> VerdictRow | None:
    return session.scalars(select(VerdictRow).where(VerdictRow.snapshot_id == snapshot_id)).first()


def get_verdict(session: Session, *, verdict_id: int) -> VerdictRow | None:
    return session.get(VerdictRow, verdict_id)


def overrides_for(session: Session, *, verdict_ids: Sequence[int]) -> dict[int, list[OverrideRow]]:
    """Overrides of each verdict, oldest first."""
    out: dict[int, list[OverrideRow]] = {vid: [] for vid in verdict_ids}
    if not verdict_ids:
        return out
    rows = session.scalars(
        select(OverrideRow).where(OverrideRow.verdict_id.in_(verdict_ids)).order_by(OverrideRow.id)
    ).all()
    for row in rows:
        out[row.verdict_id].append(row)
    return out


def add_override(
    session: Session, *, verdict_id: int, decision: str, reason: str, actor: str, now: datetime
) -> OverrideRow:
    row = OverrideRow(
        verdict_id=verdict_id, decision=decision, reason=reason, actor=actor, created_at=now
    )
    session.add(row)
    session.flush()
    return row


def effective_decision(verdict: VerdictRow, overrides: Sequence[OverrideRow]) -> str:
    """The decision in force: the latest override's, else the gate's own."""
    return overrides[-1].decision if overrides else verdict.decision


def encode_cursor(verdict_id: int) -> str:
    return base64.urlsafe_b64encode(f"v1:{verdict_id}".encode()).decode().rstrip("=")


def decode_cursor(cursor: str) -> int:
    """The verdict id inside *cursor*; ValueError when it is not one of ours."""
    try:
        padded = cursor + "=" * (-len(cursor) % 4)
        text = base64.urlsafe_b64decode(padded.encode()).decode()
        tag, _, number = text.partition(":")
        if tag != "v1":
            raise ValueError
        value = int(number)
        if value < 0 or value > 2**31 - 1:  # ids are 32-bit integers (PostgreSQL integer)
            raise ValueError
        return value
    except (ValueError, UnicodeDecodeError) as exc:
        raise ValueError("cursor is not valid; use the next_cursor of an earlier page") from exc


def list_verdicts(
    session: Session,
    *,
    model_id: int,
    decision: str | None = None,
    since: datetime | None = None,
    until: datetime | None = None,
    limit: int = 50,
    before_id: int | None = None,
    details: bool = False,
) -> tuple[list[tuple[VerdictRow, SnapshotRow]], int | None]:
    """Verdicts newest first, and the id to continue before (None on the last page).

    The verdicts' ``findings`` are not loaded (a listing never shows them; their numbers are
    in ``finding_values``, see :mod:`service.store.history_values`); nor, unless *details*,
    are the snapshots' metrics, tags and score summaries (loaded on first access while the
    session is open).
    """
    options = [defer(VerdictRow.findings)]
    if not details:
        options += [defer(SnapshotRow.metrics), defer(SnapshotRow.tags)]
        options += [defer(SnapshotRow.summary)]
    stmt: Select[VerdictRow, SnapshotRow] = (
        select(VerdictRow, SnapshotRow)
        .join(SnapshotRow, SnapshotRow.id == VerdictRow.snapshot_id)
        .where(VerdictRow.model_id == model_id)
        .options(*options)
    )
    if decision is not None:
        stmt = stmt.where(VerdictRow.decision == decision)
    if since is not None:
        stmt = stmt.where(VerdictRow.created_at >= since)
    if until is not None:
        stmt = stmt.where(VerdictRow.created_at < until)
    if before_id is not None:
        stmt = stmt.where(VerdictRow.id < before_id)
    rows = [
        (v, s) for v, s in session.execute(stmt.order_by(VerdictRow.id.desc()).limit(limit + 1))
    ]
    more = len(rows) > limit
    rows = rows[:limit]
    return rows, (rows[-1][0].id if more and rows else None)


def count_verdicts(
    session: Session, *, model_id: int, decision: str | None = None, since: datetime | None = None
) -> int:
    stmt = select(func.count(VerdictRow.id)).where(VerdictRow.model_id == model_id)
    if decision is not None:
        stmt = stmt.where(VerdictRow.decision == decision)
    if since is not None:
        stmt = stmt.where(VerdictRow.created_at >= since)
    return int(session.scalar(stmt) or 0)


def neighbour_verdicts(session: Session, *, verdict: VerdictRow) -> tuple[int | None, int | None]:
    """(previous id, next id) among the same model's verdicts."""
    prev_id = session.scalar(
        select(func.max(VerdictRow.id)).where(
            VerdictRow.model_id == verdict.model_id, VerdictRow.id < verdict.id
        )
    )
    next_id = session.scalar(
        select(func.min(VerdictRow.id)).where(
            VerdictRow.model_id == verdict.model_id, VerdictRow.id > verdict.id
        )
    )
    return prev_id, next_id


# --- baseline and promotions --------------------------------------------------------------


def set_baseline(
    session: Session,
    *,
    model: ModelRow,
    snapshot: SnapshotRow,
    cause: str,
    actor: str,
    reason: str,
    verdict_id: int | None,
    now: datetime,
) -> PromotionRow:
    """Make *snapshot* the model's baseline and record the promotion."""
    promotion = PromotionRow(
        model_id=model.id,
        snapshot_id=snapshot.id,
        previous_id=model.baseline_id,
        cause=cause,
        verdict_id=verdict_id,
        actor=actor,
        reason=reason,
        created_at=now,
    )
    session.add(promotion)
    model.baseline_id = snapshot.id
    model.baseline_since = now
    session.flush()
    return promotion


def promotion_as_of(session: Session, *, model_id: int, at: datetime) -> PromotionRow | None:
    """The newest promotion at or before *at*: its snapshot was the baseline at that time."""
    return session.scalars(
        select(PromotionRow)
        .where(PromotionRow.model_id == model_id, PromotionRow.created_at <= at)
        .order_by(PromotionRow.created_at.desc(), PromotionRow.id.desc())
        .limit(1)
    ).first()


def newest_watermark(
    session: Session, *, model_id: int, before_snapshot_id: int | None = None
) -> datetime | None:
    """The newest ``trained_until`` of the model's snapshots (held or not), among those stored
    before snapshot *before_snapshot_id* when given; None when none has one."""
    stmt = select(func.max(SnapshotRow.trained_until)).where(SnapshotRow.model_id == model_id)
    if before_snapshot_id is not None:
        stmt = stmt.where(SnapshotRow.id < before_snapshot_id)
    return utc(session.scalar(stmt))


def promoted_as_of_watermark(
    session: Session, *, model_id: int, until: datetime
) -> SnapshotRow | None:
    """The snapshot with the newest watermark at or before *until* among those that became the
    baseline and were not replaced by a rollback (SQL form of
    :func:`service.gate.reference.baseline_as_of_watermark`)."""
    rolled_back = select(PromotionRow.previous_id).where(
        PromotionRow.model_id == model_id,
        PromotionRow.cause == "rollback",
        PromotionRow.previous_id.is_not(None),
    )
    return session.scalars(
        select(SnapshotRow)
        .join(PromotionRow, PromotionRow.snapshot_id == SnapshotRow.id)
        .where(
            PromotionRow.model_id == model_id,
            SnapshotRow.trained_until.is_not(None),
            SnapshotRow.trained_until <= until,
            SnapshotRow.id.not_in(rolled_back),
        )
        .order_by(SnapshotRow.trained_until.desc(), PromotionRow.id.desc())
        .limit(1)
    ).first()


def set_reference(session: Session, *, model: ModelRow, snapshot: SnapshotRow | None) -> None:
    """Pin *snapshot* as the model's reference (None: unpin)."""
    model.reference_id = snapshot.id if snapshot is not None else None
    session.flush()


def promotions(session: Session, *, model_id: int, limit: int = 100) -> Sequence[PromotionRow]:
    return session.scalars(
        select(PromotionRow)
        .where(PromotionRow.model_id == model_id)
        .order_by(PromotionRow.id.desc())
        .limit(limit)
    ).all()


# --- history for the gate -----------------------------------------------------------------


def history(
    session: Session, *, model_id: int, limit: int, before_id: int | None = None
) -> tuple[HistoryEntry, ...]:
    """The model's last *limit* verdicts (before verdict *before_id*, when given), newest
    first, as the gate's history.

    ``healthy``: it ended as ``promote`` (by its verdict or an override), it became the
    baseline, and it was not the baseline that a rollback replaced. Whether an overridden hold
    counts towards learned limits is the gate's call (``decision`` stays the gate's own;
    see service/gate/history.py).
    """
    if limit <= 0:
        return ()
    # One query, only the columns the gate needs: never the findings (their values come from
    # finding_values in one index range), so the cost does not grow with what they hold. The
    # latest override and whether the snapshot was promoted or replaced by a rollback are
    # subqueries answered by the indexes on overrides.verdict_id, promotions.snapshot_id and
    # promotions.previous_id. Core columns: plain rows, no ORM loading.
    v, s = VerdictRow.__table__, SnapshotRow.__table__
    o, p = OverrideRow.__table__, PromotionRow.__table__
    override = (
        select(o.c.decision)
        .where(o.c.verdict_id == v.c.id)
        .order_by(o.c.id.desc())
        .limit(1)
        .scalar_subquery()
    )
    promoted = exists().where(p.c.snapshot_id == s.c.id)
    rolled_back = exists().where(p.c.previous_id == s.c.id, p.c.cause == "rollback")
    stmt = (
        select(v.c.id, v.c.decision, v.c.created_at, s.c.key, s.c.rows_trained)
        .add_columns(s.c.trained_until, override, promoted, rolled_back)
        .join_from(v, s, s.c.id == v.c.snapshot_id)
        .where(v.c.model_id == model_id)
    )
    if before_id is not None:
        stmt = stmt.where(v.c.id < before_id)
    rows = session.execute(stmt.order_by(v.c.id.desc()).limit(limit)).all()
    values = history_values.values_by_verdict(
        session, model_id=model_id, verdict_ids=[r[0] for r in rows]
    )
    return tuple(
        HistoryEntry(
            snapshot_key=key,
            created_at=utc(created_at),  # type: ignore[arg-type]
            decision=decision,
            effective_decision=overridden or decision,
            # healthy: promote in the end, became the baseline, not rolled back
            healthy=(overridden or decision) == "promote" and bool(ever) and not bool(undone),
            rows_trained=rows_trained,
            trained_until=utc(trained_until),
            values=values[verdict_id],
        )
        for (
            verdict_id,
            decision,
            created_at,
            key,
            rows_trained,
            trained_until,
            overridden,
            ever,
            undone,
        ) in rows
    )


# --- audit --------------------------------------------------------------------------------


def add_audit(
    session: Session,
    *,
    actor: str,
    action: str,
    model: str | None,
    target: str | None,
    before: dict[str, Any] | None,
    after: dict[str, Any] | None,
    reason: str,
    now: datetime,
) -> AuditRow:
    row = AuditRow(
        at=now,
        actor=actor,
        action=action,
        model=model,
        target=target,
        before=before,
        after=after,
        reason=reason,
    )
    session.add(row)
    session.flush()
    return row


def audit_choices(session: Session) -> tuple[list[str], list[str]]:
    """The distinct actions and actors in the audit log (for the audit page's filters)."""
    actions = session.scalars(select(AuditRow.action).distinct().order_by(AuditRow.action)).all()
    actors = session.scalars(select(AuditRow.actor).distinct().order_by(AuditRow.actor)).all()
    return list(actions), list(actors)


def list_audit(
    session: Session,
    *,
    model: str | None = None,
    limit: int = 100,
    before_id: int | None = None,
    exclude_actor: str | None = None,
    actor: str | None = None,
    action: str | None = None,
    since: datetime | None = None,
    until: datetime | None = None,
    models: Sequence[str] | None = None,
) -> Sequence[AuditRow]:
    """Audit entries newest first: optionally of one model (or of the *models* listed), by one
    actor, of one action, at or after *since* and before *until*, without one actor's entries.
    """
    stmt = select(AuditRow)
    if model is not None:
        stmt = stmt.where(AuditRow.model == model)
    if models is not None:
        stmt = stmt.where(AuditRow.model.in_(list(models)))
    if exclude_actor is not None:
        # Two ranges of ix_audit_log_model_actor rather than "!=", which no index serves:
        # the entries of a busy model are mostly the gate's own.
        stmt = stmt.where(or_(AuditRow.actor < exclude_actor, AuditRow.actor > exclude_actor))
    if actor is not None:
        stmt = stmt.where(AuditRow.actor == actor)
    if action is not None:
        stmt = stmt.where(AuditRow.action == action)
    if since is not None:
        stmt = stmt.where(AuditRow.at >= since)
    if until is not None:
        stmt = stmt.where(AuditRow.at < until)
    if before_id is not None:
        stmt = stmt.where(AuditRow.id < before_id)
    return session.scalars(stmt.order_by(AuditRow.id.desc()).limit(limit)).all()


def verdict_counts_by_model(session: Session) -> dict[tuple[int, str], int]:
    """How many verdicts each model has, by the gate's decision: ``{(model_id, decision): n}``."""
    stmt = select(VerdictRow.model_id, VerdictRow.decision, func.count(VerdictRow.id)).group_by(
        VerdictRow.model_id, VerdictRow.decision
    )
    return {(int(m), str(d)): int(n) for m, d, n in session.execute(stmt)}


# --- what serves ----------------------------------------------------------------------------


def serving_promotion(session: Session, *, model: ModelRow) -> PromotionRow | None:
    """The promotion that made the model's current baseline serve (its newest promotion of
    that snapshot); None when nothing serves."""
    if model.baseline_id is None:
        return None
    return session.scalars(
        select(PromotionRow)
        .where(PromotionRow.model_id == model.id, PromotionRow.snapshot_id == model.baseline_id)
        .order_by(PromotionRow.id.desc())
        .limit(1)
    ).first()


def audit_entry_at(
    session: Session, *, model: str, at: datetime, actions: Sequence[str]
) -> AuditRow | None:
    """The newest audit entry of *model* with one of *actions* written at *at* (a change of
    the baseline writes its promotion and its audit entry with the same time)."""
    return session.scalars(
        select(AuditRow)
        .where(AuditRow.model == model, AuditRow.at == at, AuditRow.action.in_(list(actions)))
        .order_by(AuditRow.id.desc())
        .limit(1)
    ).first()


# --- service keys -------------------------------------------------------------------------


def service_key(session: Session, *, name: str, make: Any, now: datetime) -> str:
    """The service secret called *name*, made with *make()* at first use (two workers making
    it at once agree: insert-if-absent, then read)."""
    found = session.get(ServiceKeyRow, name)
    if found is not None:
        return found.value
    _insert_if_absent(
        session, ServiceKeyRow, "name", {"name": name, "value": make(), "created_at": now}
    )
    return str(session.scalars(select(ServiceKeyRow.value).where(ServiceKeyRow.name == name)).one())
