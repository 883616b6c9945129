"""Run and inspect Alembic migrations from code (CLI, tests, readiness)."""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Connection, text

from app.db import make_engine

MIGRATIONS_DIR = Path(__file__).resolve().parent.parent / "migrations"


def alembic_config(database_url: str) -> Config:
    """An Alembic config pointing at our migrations folder and the given database."""
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    config.set_main_option("sqlalchemy.url", database_url.replace("%", "%%"))
    return config


def upgrade(database_url: str, revision: str = "head") -> None:
    """Bring the database schema to `revision` (default: newest)."""
    command.upgrade(alembic_config(database_url), revision)


def upgrade_empty(database_url: str) -> None:
    """Empty a scratch database and migrate it from nothing (tests, benchmarks).

    PostgreSQL: the public schema is dropped with everything in it and made again. SQLite: the
    file is taken as it is (callers pass a new one).
    """
    if database_url.startswith("postgresql"):
        engine = make_engine(database_url)
        with engine.begin() as conn:
            conn.execute(text("DROP SCHEMA public CASCADE"))
            conn.execute(text("CREATE SCHEMA public"))
        engine.dispose()
    upgrade(database_url)


def current_and_head(connection: Connection) -> tuple[str | None, str | None]:
    """The database's schema revision and the newest one we ship."""
    current = MigrationContext.configure(connection).get_current_revision()
    head = ScriptDirectory.from_config(alembic_config("sqlite://")).get_current_head()
    return current, head
