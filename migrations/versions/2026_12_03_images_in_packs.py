"""images in packs

Revision ID: 0011
Revises: 0010
Create Date: 2026-12-03 14:22:23.443001

Camera images are written in bulk, one pack file per upload under the blob folder, and this
table says where each image's bytes are (app/ingest/image_store.py). Images stored before it as
single files (blobs/<sha[:2]>/<sha>) keep being served from there; nothing is moved.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0011"
down_revision: str | None = "0010"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "images",
        sa.Column("sha256", sa.String(length=64), nullable=False),
        sa.Column("pack", sa.String(length=32), nullable=False),
        sa.Column("byte_offset", sa.BigInteger(), nullable=False),
        sa.Column("byte_length", sa.Integer(), nullable=False),
        sa.PrimaryKeyConstraint("sha256", name=op.f("pk_images")),
    )


def downgrade() -> None:
    # The pack files stay in the blob folder; the code before this revision cannot read them.
    op.drop_table("images")
