"""Alembic environment: our one MetaData, online migrations only."""

from __future__ import annotations

from alembic import context

from expertloop.db import SQLITE_BEGIN_IMMEDIATE, make_engine
from expertloop.models import Base, import_all_tables

import_all_tables()
target_metadata = Base.metadata


def run_migrations_online() -> None:
    config = context.config
    connection = config.attributes.get("connection")
    if connection is not None:
        context.configure(connection=connection, target_metadata=target_metadata)
        with context.begin_transaction():
            context.run_migrations()
        return
    url = config.get_main_option("sqlalchemy.url")
    assert url, "sqlalchemy.url must be set"
    engine = make_engine(url)
    with engine.connect() as conn:
        if conn.dialect.name == "sqlite":
            # Take the write lock at BEGIN: a deferred transaction that reads and then writes
            # fails at once ("database is locked") when another process (a worker beside the
            # server) committed in between, whereas BEGIN IMMEDIATE waits its turn.
            conn.execution_options(**{SQLITE_BEGIN_IMMEDIATE: True})
        context.configure(
            connection=conn,
            target_metadata=target_metadata,
            render_as_batch=conn.dialect.name == "sqlite",
        )
        with context.begin_transaction():
            context.run_migrations()
    engine.dispose()


if context.is_offline_mode():
    raise SystemExit(
        "offline (SQL script) migrations are not supported; run `expertloop db upgrade`"
    )
run_migrations_online()
