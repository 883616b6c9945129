"""labels by annotator and time

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02 12:55:00.000000
"""

from __future__ import annotations

from collections.abc import Sequence

from alembic import op

revision: str = "0004"
down_revision: str | None = "0003"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    # progress and pace read an annotator's labels of the day on every bench page
    with op.batch_alter_table("labels", schema=None) as batch_op:
        batch_op.create_index("ix_labels_user_id_created_at", ["user_id", "created_at"])


def downgrade() -> None:
    with op.batch_alter_table("labels", schema=None) as batch_op:
        batch_op.drop_index("ix_labels_user_id_created_at")
