"""finding values: the numbers of every finding per verdict, and indexes for history reads

Creates ``finding_values`` (one row per verdict per finding: identity, outcome, value, limit,
p-value, both sides, interval ends, ``details["learn"]``), fills it from the findings of every
stored verdict, and adds the indexes the history reads use: recent holds per model
(``verdicts``: model, decision, created_at), promotions by snapshot, by replaced snapshot and
by model and time, and audit entries by model and actor.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02 08:10:00
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from typing import Any

import sqlalchemy as sa
from alembic import op

revision: str = "0002"
down_revision: str | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

#: Verdicts read and written per round of the fill (bounded memory on a large database).
BATCH = 2000


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def _rows(verdict_id: int, model_id: int, findings: Any) -> list[dict[str, Any]]:
    """The rows of one verdict, as service/store/history_values.py writes them at revision
    0002 (kept here so this migration never changes with the service's code)."""
    if isinstance(findings, str):
        findings = json.loads(findings)
    out: list[dict[str, Any]] = []
    for position, f in enumerate(findings or []):
        if not isinstance(f, Mapping) or "check" not in f:
            continue
        interval = f.get("interval")
        low = high = None
        if isinstance(interval, (list, tuple)) and len(interval) == 2:
            low, high = _number(interval[0]), _number(interval[1])
        details = f.get("details")
        learn = details.get("learn") if isinstance(details, Mapping) else None
        flat = None
        if isinstance(learn, Mapping):
            flat = {str(k): n for k, v in learn.items() if (n := _number(v)) is not None} or None
        out.append(
            {
                "verdict_id": verdict_id,
                "model_id": model_id,
                "position": position,
                "check_name": str(f["check"])[:200],
                "kind": str(f.get("kind", ""))[:40],
                "statistic": None if f.get("statistic") is None else str(f["statistic"])[:200],
                "against": None if f.get("against") is None else str(f["against"])[:20],
                "outcome": str(f.get("outcome", ""))[:16],
                "value": _number(f.get("value")),
                "limit_value": _number(f.get("limit")),
                "pvalue": _number(f.get("pvalue")),
                "baseline_value": _number(f.get("baseline_value")),
                "candidate_value": _number(f.get("candidate_value")),
                "interval_low": low,
                "interval_high": high,
                "learn": flat,
            }
        )
    return out


def upgrade() -> None:
    values = op.create_table(
        "finding_values",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("verdict_id", sa.Integer(), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("position", sa.Integer(), nullable=False),
        sa.Column("check_name", sa.String(length=200), nullable=False),
        sa.Column("kind", sa.String(length=40), nullable=False),
        sa.Column("statistic", sa.String(length=200), nullable=True),
        sa.Column("against", sa.String(length=20), nullable=True),
        sa.Column("outcome", sa.String(length=16), nullable=False),
        sa.Column("value", sa.Float(), nullable=True),
        sa.Column("limit_value", sa.Float(), nullable=True),
        sa.Column("pvalue", sa.Float(), nullable=True),
        sa.Column("baseline_value", sa.Float(), nullable=True),
        sa.Column("candidate_value", sa.Float(), nullable=True),
        sa.Column("interval_low", sa.Float(), nullable=True),
        sa.Column("interval_high", sa.Float(), nullable=True),
        sa.Column("learn", sa.JSON(), nullable=True),
        sa.ForeignKeyConstraint(
            ["model_id"], ["models.id"], name=op.f("fk_finding_values_model_id_models")
        ),
        sa.ForeignKeyConstraint(
            ["verdict_id"],
            ["verdicts.id"],
            name=op.f("fk_finding_values_verdict_id_verdicts"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_finding_values")),
    )
    with op.batch_alter_table("finding_values", schema=None) as batch_op:
        batch_op.create_index(
            "ix_finding_values_model_verdict", ["model_id", "verdict_id"], unique=False
        )
    with op.batch_alter_table("promotions", schema=None) as batch_op:
        batch_op.create_index(
            "ix_promotions_model_created", ["model_id", "created_at"], unique=False
        )
        batch_op.create_index(
            batch_op.f("ix_promotions_previous_id"), ["previous_id"], unique=False
        )
        batch_op.create_index(
            batch_op.f("ix_promotions_snapshot_id"), ["snapshot_id"], unique=False
        )
    with op.batch_alter_table("audit_log", schema=None) as batch_op:
        batch_op.create_index("ix_audit_log_model_actor", ["model", "actor", "id"], unique=False)
    with op.batch_alter_table("verdicts", schema=None) as batch_op:
        batch_op.create_index(
            "ix_verdicts_model_decision_created",
            ["model_id", "decision", "created_at"],
            unique=False,
        )

    # Fill finding_values from the findings of the verdicts stored so far, in id order.
    bind = op.get_bind()
    verdicts = sa.table(
        "verdicts",
        sa.column("id", sa.Integer),
        sa.column("model_id", sa.Integer),
        sa.column("findings", sa.JSON),
    )
    after = 0
    while True:
        batch = bind.execute(
            sa.select(verdicts.c.id, verdicts.c.model_id, verdicts.c.findings)
            .where(verdicts.c.id > after)
            .order_by(verdicts.c.id)
            .limit(BATCH)
        ).all()
        if not batch:
            break
        rows: list[dict[str, Any]] = []
        for verdict_id, model_id, findings in batch:
            rows.extend(_rows(verdict_id, model_id, findings))
        if rows:
            bind.execute(sa.insert(values), rows)
        after = batch[-1][0]


def downgrade() -> None:
    with op.batch_alter_table("audit_log", schema=None) as batch_op:
        batch_op.drop_index("ix_audit_log_model_actor")
    with op.batch_alter_table("verdicts", schema=None) as batch_op:
        batch_op.drop_index("ix_verdicts_model_decision_created")
    with op.batch_alter_table("promotions", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_promotions_snapshot_id"))
        batch_op.drop_index(batch_op.f("ix_promotions_previous_id"))
        batch_op.drop_index("ix_promotions_model_created")
    with op.batch_alter_table("finding_values", schema=None) as batch_op:
        batch_op.drop_index("ix_finding_values_model_verdict")
    op.drop_table("finding_values")
