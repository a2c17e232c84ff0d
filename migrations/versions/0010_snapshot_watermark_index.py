"""snapshot watermark index: the newest watermark a model posted, the reference by watermark

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-02 08:10:00
"""

from __future__ import annotations

from collections.abc import Sequence

from alembic import op

revision: str = "0010"
down_revision: str | None = "0009"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("snapshots", schema=None) as batch_op:
        batch_op.create_index(
            "ix_snapshots_model_watermark", ["model_id", "trained_until"], unique=False
        )


def downgrade() -> None:
    with op.batch_alter_table("snapshots", schema=None) as batch_op:
        batch_op.drop_index("ix_snapshots_model_watermark")
