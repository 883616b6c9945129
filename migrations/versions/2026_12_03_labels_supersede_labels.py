"""labels supersede labels

Revision ID: 0008
Revises: 0006
Create Date: 2026-12-03 08:06:33.620658
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0008"
down_revision: str | None = "0006"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    # a change or an undo of a label is a new row naming the label it replaces (at most once)
    with op.batch_alter_table("labels", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column(
                "supersedes_id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=True
            )
        )
        batch_op.create_unique_constraint(batch_op.f("uq_labels_supersedes_id"), ["supersedes_id"])
        batch_op.create_foreign_key(
            batch_op.f("fk_labels_supersedes_id_labels"),
            "labels",
            ["supersedes_id"],
            ["id"],
            ondelete="CASCADE",
        )


def downgrade() -> None:
    with op.batch_alter_table("labels", schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f("fk_labels_supersedes_id_labels"), type_="foreignkey")
        batch_op.drop_constraint(batch_op.f("uq_labels_supersedes_id"), type_="unique")
        batch_op.drop_column("supersedes_id")
