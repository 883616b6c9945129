"""Run and inspect Alembic migrations from code (CLI, tests, readiness)."""

from __future__ import annotations

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Connection

from .resources import shipped_folder

MIGRATIONS_DIR = shipped_folder("migrations")


def alembic_config(database_url: str) -> Config:
    """An Alembic config pointing at our migrations folder and the given database."""
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    config.set_main_option("sqlalchemy.url", database_url.replace("%", "%%"))
    return config


def upgrade(database_url: str, revision: str = "head") -> None:
    """Bring the database schema to `revision` (default: newest)."""
    command.upgrade(alembic_config(database_url), revision)


def current_and_head(connection: Connection) -> tuple[str | None, str | None]:
    """The database's schema revision and the newest one we ship."""
    current = MigrationContext.configure(connection).get_current_revision()
    head = ScriptDirectory.from_config(alembic_config("sqlite://")).get_current_head()
    return current, head
