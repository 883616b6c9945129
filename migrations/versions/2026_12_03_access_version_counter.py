"""access version counter

Revision ID: 0010
Revises: 0008
Create Date: 2026-12-03 13:41:51.069625

App processes cache who a token or browser session belongs to, and compare one counter with the
store on every request (app/auth/cache.py). Triggers bump the counter in the same transaction as
any UPDATE or DELETE of users, API tokens or browser sessions (on PostgreSQL TRUNCATE too), so a
revocation, a deactivation or a role change made anywhere is seen by the next request of every
process. Tables rebuilt by a later SQLite batch migration lose their triggers:
tests/access/test_identity_cache.py fails if any is missing.
"""

from __future__ import annotations

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0010"
down_revision: str | None = "0008"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

WATCHED = ("users", "api_tokens", "browser_sessions")
# An upsert: a store emptied table by table (tests do) has no row until the next change.
BUMP = (
    "INSERT INTO access_version (id, version) VALUES (1, 1) "
    "ON CONFLICT (id) DO UPDATE SET version = access_version.version + 1"
)


def upgrade() -> None:
    op.create_table(
        "access_version",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("version", sa.BigInteger(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_access_version")),
    )
    op.execute("INSERT INTO access_version (id, version) VALUES (1, 0)")
    if op.get_bind().dialect.name == "postgresql":
        op.execute(
            "CREATE FUNCTION bump_access_version() RETURNS trigger LANGUAGE plpgsql AS $$ "
            f"BEGIN {BUMP}; RETURN NULL; END $$"
        )
        for table in WATCHED:
            # once per statement: a statement touching many rows bumps once
            op.execute(
                f"CREATE TRIGGER {table}_bump_access_version "
                f"AFTER UPDATE OR DELETE OR TRUNCATE ON {table} "
                "FOR EACH STATEMENT EXECUTE FUNCTION bump_access_version()"
            )
        return
    for table in WATCHED:
        for event in ("update", "delete"):  # SQLite triggers fire once per row
            op.execute(
                f"CREATE TRIGGER {table}_{event}_bumps_access_version "
                f"AFTER {event.upper()} ON {table} BEGIN {BUMP}; END"
            )


def downgrade() -> None:
    if op.get_bind().dialect.name == "postgresql":
        for table in WATCHED:
            op.execute(f"DROP TRIGGER {table}_bump_access_version ON {table}")
        op.execute("DROP FUNCTION bump_access_version()")
    else:
        for table in WATCHED:
            for event in ("update", "delete"):
                op.execute(f"DROP TRIGGER {table}_{event}_bumps_access_version")
    op.drop_table("access_version")
