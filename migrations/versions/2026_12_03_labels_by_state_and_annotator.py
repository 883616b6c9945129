"""labels by state and annotator

Revision ID: 0012
Revises: 0011
Create Date: 2026-12-03 19:20:00.000000

The submit path asks for one annotator's current answer on a state. With an index on the state
alone, SQLite (without statistics) chose the annotator index instead and read every label the
annotator had given, so submits slowed as an annotator worked. The state index gains the user id;
it still serves every read by state (its first column).
"""

from __future__ import annotations

from collections.abc import Sequence

from alembic import op

revision: str = "0012"
down_revision: str | None = "0011"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("labels", schema=None) as batch_op:
        batch_op.create_index("ix_labels_step_id_user_id", ["step_id", "user_id"])
        batch_op.drop_index("ix_labels_step_id")


def downgrade() -> None:
    with op.batch_alter_table("labels", schema=None) as batch_op:
        batch_op.create_index("ix_labels_step_id", ["step_id"])
        batch_op.drop_index("ix_labels_step_id_user_id")
