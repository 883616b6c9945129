"""an annotator's labels by round, and skips by annotator

Revision ID: 0013
Revises: 0012
Create Date: 2026-12-04 17:50:00.000000

The bench page asks for the annotator's progress after every claim. "Left for you" was counted
open item by open item (is it labelled or skipped by you?), which grew with the open queue: about
9 ms on SQLite at 20,000 open items. It is now counted from the annotator's own labels in the
rounds that still have open items, and their own skips, which these indexes find directly.
"""

from __future__ import annotations

from collections.abc import Sequence

from alembic import op

revision: str = "0013"
down_revision: str | None = "0012"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("labels", schema=None) as batch_op:
        batch_op.create_index("ix_labels_user_id_round_id", ["user_id", "round_id"])
    with op.batch_alter_table("skips", schema=None) as batch_op:
        batch_op.create_index("ix_skips_user_id", ["user_id"])


def downgrade() -> None:
    with op.batch_alter_table("skips", schema=None) as batch_op:
        batch_op.drop_index("ix_skips_user_id")
    with op.batch_alter_table("labels", schema=None) as batch_op:
        batch_op.drop_index("ix_labels_user_id_round_id")
