"""loops carry an optional log mapping (robot logs mapped to states)

Revision ID: 0009
Revises: 0004
Create Date: 2026-12-03 08:30:00.000000
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0009"
down_revision: str | None = "0004"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("loops", schema=None) as batch_op:
        batch_op.add_column(sa.Column("log_mapping", sa.JSON(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("loops", schema=None) as batch_op:
        batch_op.drop_column("log_mapping")
