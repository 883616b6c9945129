"""Shared fixtures: a clean, migrated database per test on SQLite (default) or PostgreSQL.

Set EXPERTLOOP_TEST_DATABASE_URL (e.g. postgresql+psycopg://postgres@127.0.0.1:5432/test) to run
the same suite on PostgreSQL.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine, inspect, text

from expertloop.config import Settings
from expertloop.db import make_engine
from expertloop.main import create_app
from expertloop.migrations_state import upgrade
from tests.serving import upgrade_empty

PG_URL = os.environ.get("EXPERTLOOP_TEST_DATABASE_URL")
# Hypothesis (under schemathesis) keeps caches in ./.hypothesis unless told otherwise: keep them
# out of the checkout, whose every file tests/docs reads.
os.environ.setdefault(
    "HYPOTHESIS_STORAGE_DIRECTORY", os.path.join(tempfile.gettempdir(), "expertloop-hypothesis")
)


def pytest_report_header() -> str:
    return (
        f"expertloop store: {'PostgreSQL ' + PG_URL if PG_URL else 'SQLite (fresh file per test)'}"
    )


@pytest.fixture(scope="session")
def migrated_template(tmp_path_factory: pytest.TempPathFactory) -> str:
    """Migrate once: a SQLite template file, or the PostgreSQL test database from scratch."""
    if PG_URL:
        upgrade_empty(PG_URL)
        return PG_URL
    path = tmp_path_factory.mktemp("template") / "template.db"
    url = f"sqlite:///{path}"
    upgrade(url)
    return str(path)


def _truncate_all(url: str) -> None:
    engine = make_engine(url)
    tables = [t for t in inspect(engine).get_table_names() if t != "alembic_version"]
    with engine.begin() as conn:
        if tables:
            conn.execute(text(f"TRUNCATE {', '.join(tables)} RESTART IDENTITY CASCADE"))
    engine.dispose()


@pytest.fixture
def database_url(migrated_template: str, tmp_path: Path) -> str:
    """A clean, migrated database for this test."""
    if PG_URL:
        _truncate_all(PG_URL)
        return PG_URL
    target = tmp_path / "store.db"
    shutil.copyfile(migrated_template, target)
    return f"sqlite:///{target}"


@pytest.fixture
def settings(database_url: str, tmp_path: Path) -> Settings:
    # Jobs run only where a test drives them (run_one) or asks for the thread explicitly.
    return Settings(
        data_dir=tmp_path / "data",
        database_url=database_url,
        max_upload_bytes=5 * 1024 * 1024,
        job_mode="off",
    )


@pytest.fixture
def app(settings: Settings) -> Any:
    return create_app(settings)


@pytest.fixture
def client(app: Any) -> Iterator[TestClient]:
    with TestClient(app) as test_client:
        yield test_client


@pytest.fixture
def engine(app: Any) -> Engine:
    return app.state.engine  # type: ignore[no-any-return]


@pytest.fixture
def make_user(app: Any) -> Callable[..., dict[str, str]]:
    """Create a user with roles; returns its Authorization header."""
    from expertloop.auth import service

    def make(*roles: str, name: str | None = None, password: str | None = None) -> dict[str, str]:
        with app.state.session_factory.begin() as session:
            user = service.create_user(
                session,
                name=name or "-".join(roles) + "-user",
                roles=list(roles),
                password=password,
            )
            token = service.issue_token(session, user=user)
        return {"Authorization": f"Bearer {token}"}

    return make


@pytest.fixture
def admin(make_user: Callable[..., dict[str, str]]) -> dict[str, str]:
    return make_user("admin", name="root-admin")


@pytest.fixture
def uploader(make_user: Callable[..., dict[str, str]]) -> dict[str, str]:
    return make_user("uploader", name="fleet-uploader")


def store_contents(engine: Engine) -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every table, ordered: to prove a refused request changed nothing."""
    out: dict[str, list[tuple[Any, ...]]] = {}
    with engine.connect() as conn:
        for table in sorted(inspect(conn).get_table_names()):
            rows = conn.execute(text(f"SELECT * FROM {table}")).all()
            out[table] = sorted((tuple(r) for r in rows), key=repr)
    return out
