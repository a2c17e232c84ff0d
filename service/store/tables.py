"""SQLAlchemy 2 tables. Created and changed only by Alembic migrations (see migrations/).

Times are stored as timezone-aware UTC (``DateTime(timezone=True)``); SQLite keeps them as text
and the repository functions re-attach UTC on the way out.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)
    type_annotation_map = {dict[str, Any]: JSON, list[Any]: JSON}


class ModelRow(Base):
    """A named model line."""

    __tablename__ = "models"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(100), unique=True)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    baseline_id: Mapped[int | None] = mapped_column(
        ForeignKey("snapshots.id", use_alter=True, name="fk_models_baseline_id_snapshots")
    )
    baseline_since: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))
    #: A reference pinned by an operator (None: none pinned).
    reference_id: Mapped[int | None] = mapped_column(
        ForeignKey("snapshots.id", use_alter=True, name="fk_models_reference_id_snapshots")
    )


class SnapshotRow(Base):
    """One trained state of a model; its key is the trainer's own, unique per model."""

    __tablename__ = "snapshots"
    __table_args__ = (
        UniqueConstraint("model_id", "key", name="uq_snapshots_model_key"),
        # The newest watermark a model posted (lineage) and the reference by watermark.
        Index("ix_snapshots_model_watermark", "model_id", "trained_until"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id"), index=True)
    key: Mapped[str] = mapped_column(String(200))
    parent_key: Mapped[str | None] = mapped_column(String(200))
    trained_until: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))
    code_version: Mapped[str | None] = mapped_column(String(200))
    rows_trained: Mapped[int | None] = mapped_column(BigInteger)
    metrics: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    tags: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    #: sha256 of the canonical request body: tells a retry from a conflicting reuse of the key.
    content_digest: Mapped[str] = mapped_column(String(80))
    sample_rows: Mapped[int] = mapped_column(Integer, default=0)
    #: Summary of the score column (count, quantiles, histogram); survives pruning.
    summary: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    sample_pruned_at: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


class SampleColumnRow(Base):
    """One column of a snapshot's sample, as a compressed typed array (see store/codec.py)."""

    __tablename__ = "sample_columns"
    __table_args__ = (UniqueConstraint("snapshot_id", "name", name="uq_sample_columns_name"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    snapshot_id: Mapped[int] = mapped_column(
        ForeignKey("snapshots.id", ondelete="CASCADE"), index=True
    )
    name: Mapped[str] = mapped_column(String(200))
    codec: Mapped[str] = mapped_column(String(20))
    length: Mapped[int] = mapped_column(Integer)
    data: Mapped[bytes] = mapped_column(LargeBinary)


class PolicyRow(Base):
    """The exact text of every policy a verdict was judged under, by digest."""

    __tablename__ = "policies"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(200))
    digest: Mapped[str] = mapped_column(String(80), unique=True)
    text: Mapped[str] = mapped_column(Text)
    first_seen_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


class VerdictRow(Base):
    """The gate's decision for one snapshot. Never rewritten; overrides are separate rows."""

    __tablename__ = "verdicts"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id"))
    snapshot_id: Mapped[int] = mapped_column(ForeignKey("snapshots.id"), unique=True)
    baseline_id: Mapped[int | None] = mapped_column(ForeignKey("snapshots.id"))
    reference_id: Mapped[int | None] = mapped_column(ForeignKey("snapshots.id"))
    decision: Mapped[str] = mapped_column(String(16))
    reasons: Mapped[list[Any]] = mapped_column(JSON, default=list)
    findings: Mapped[list[Any]] = mapped_column(JSON, default=list)
    policy_name: Mapped[str | None] = mapped_column(String(200))
    policy_digest: Mapped[str | None] = mapped_column(String(80))
    error: Mapped[str | None] = mapped_column(Text)
    moved_baseline: Mapped[bool] = mapped_column(default=False)
    duration_ms: Mapped[float] = mapped_column(Float)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))

    __table_args__ = (
        Index("ix_verdicts_model_created", "model_id", "id"),
        # Counts of recent holds per model (the model list, the model page).
        Index("ix_verdicts_model_decision_created", "model_id", "decision", "created_at"),
    )


class OverrideRow(Base):
    """An operator's audited change of a verdict's decision."""

    __tablename__ = "overrides"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    verdict_id: Mapped[int] = mapped_column(ForeignKey("verdicts.id"), index=True)
    decision: Mapped[str] = mapped_column(String(16))
    reason: Mapped[str] = mapped_column(Text)
    actor: Mapped[str] = mapped_column(String(200))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


class PromotionRow(Base):
    """The record that a snapshot became the baseline (by verdict, override, hand or rollback)."""

    __tablename__ = "promotions"

    __table_args__ = (
        # The baseline as of a time (the reference by lag).
        Index("ix_promotions_model_created", "model_id", "created_at"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id"), index=True)
    # Whether a snapshot was promoted or rolled back (the gate's history): by snapshot.
    snapshot_id: Mapped[int] = mapped_column(ForeignKey("snapshots.id"), index=True)
    previous_id: Mapped[int | None] = mapped_column(ForeignKey("snapshots.id"), index=True)
    cause: Mapped[str] = mapped_column(String(20))  # verdict | override | manual | rollback
    verdict_id: Mapped[int | None] = mapped_column(ForeignKey("verdicts.id"))
    actor: Mapped[str] = mapped_column(String(200))
    reason: Mapped[str] = mapped_column(Text, default="")
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


class AuditRow(Base):
    """Every state change: who, what, when, before and after."""

    __tablename__ = "audit_log"
    __table_args__ = (
        # A model's entries by actor: the model page leaves out the gate's own entries.
        Index("ix_audit_log_model_actor", "model", "actor", "id"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    at: Mapped[datetime] = mapped_column(DateTime(timezone=True), index=True)
    actor: Mapped[str] = mapped_column(String(200))
    action: Mapped[str] = mapped_column(String(60))
    model: Mapped[str | None] = mapped_column(String(100))
    target: Mapped[str | None] = mapped_column(String(200))
    before: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    after: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    reason: Mapped[str] = mapped_column(Text, default="")


class TokenRow(Base):
    """An API token, stored only as a hash (see service/store/tokens.py once access lands)."""

    __tablename__ = "api_tokens"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    token_hash: Mapped[str] = mapped_column(String(128), unique=True)
    prefix: Mapped[str] = mapped_column(String(20))
    role: Mapped[str] = mapped_column(String(20))
    models: Mapped[list[Any]] = mapped_column(JSON, default=list)
    label: Mapped[str] = mapped_column(String(200), default="")
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    revoked_at: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))
    last_used_at: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))


class DeliveryRow(Base):
    """One outgoing webhook message (an event: hold, stuck, override) and how its delivery went.

    Written in the same transaction as the verdict or override it reports (an outbox), so an
    acknowledged event is never lost; a dispatcher sends it afterwards, retrying with backoff.
    """

    __tablename__ = "webhook_deliveries"
    __table_args__ = (
        Index("ix_webhook_deliveries_model_id_id", "model_id", "id"),
        Index("ix_webhook_deliveries_pending", "delivered_at", "failed_at", "next_attempt_at"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id"))
    event: Mapped[str] = mapped_column(String(20))  # hold | stuck | override
    verdict_id: Mapped[int | None] = mapped_column(ForeignKey("verdicts.id"))
    url: Mapped[str] = mapped_column(Text)
    payload: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    next_attempt_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    #: A dispatcher that took the message holds it until then (several workers share the table).
    lease_until: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))
    last_status: Mapped[int | None] = mapped_column(Integer)
    last_error: Mapped[str] = mapped_column(Text, default="")
    last_attempt_at: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))
    delivered_at: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))
    failed_at: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))


class FindingValueRow(Base):
    """The numbers of one finding of one verdict, written with the verdict (see
    service/store/history_values.py): what learned limits and trends read, without decoding
    the verdict's findings."""

    __tablename__ = "finding_values"
    __table_args__ = (Index("ix_finding_values_model_verdict", "model_id", "verdict_id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    verdict_id: Mapped[int] = mapped_column(ForeignKey("verdicts.id", ondelete="CASCADE"))
    model_id: Mapped[int] = mapped_column(ForeignKey("models.id"))
    #: The finding's place in the verdict's list (checks run in policy order).
    position: Mapped[int] = mapped_column(Integer)
    check_name: Mapped[str] = mapped_column(String(200))
    kind: Mapped[str] = mapped_column(String(40))
    statistic: Mapped[str | None] = mapped_column(String(200))
    against: Mapped[str | None] = mapped_column(String(20))
    outcome: Mapped[str] = mapped_column(String(16))
    value: Mapped[float | None] = mapped_column(Float)
    limit_value: Mapped[float | None] = mapped_column(Float)
    pvalue: Mapped[float | None] = mapped_column(Float)
    baseline_value: Mapped[float | None] = mapped_column(Float)
    candidate_value: Mapped[float | None] = mapped_column(Float)
    interval_low: Mapped[float | None] = mapped_column(Float)
    interval_high: Mapped[float | None] = mapped_column(Float)
    #: ``Finding.details["learn"]``: further quantities a check may learn from, name -> number.
    learn: Mapped[dict[str, Any] | None] = mapped_column(JSON)


class ServiceKeyRow(Base):
    """A secret of the service itself, made at first use and shared by every worker and
    instance on the database (e.g. the key that signs the sign-in form's token)."""

    __tablename__ = "service_keys"

    name: Mapped[str] = mapped_column(String(40), primary_key=True)
    value: Mapped[str] = mapped_column(String(200))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
