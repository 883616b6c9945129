"""On PostgreSQL an app process opens at most pool size + overflow connections (README, "Scaling").

Past the bound a request waits for a connection, then answers 503 with Retry-After; the process
never opens more. SQLite's pool is not capped (a local file; its locks decide who writes).
"""

from __future__ import annotations

import time
from contextlib import ExitStack
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import text
from sqlalchemy.exc import TimeoutError as PoolTimeout

from expertloop import db
from expertloop.auth import service as auth_service
from expertloop.config import Settings
from expertloop.main import create_app
from tests.conftest import PG_URL

BOUND = db.POSTGRES_POOL_SIZE + db.POSTGRES_MAX_OVERFLOW

needs_postgres = pytest.mark.skipif(not PG_URL, reason="the bound is PostgreSQL's")


def test_the_bound_is_the_documented_thirty() -> None:
    # README, "Scaling": "Each app process opens up to 30 connections (a pool of 10 plus 20
    # overflow)"; tests/docs/test_readme_tables.py reads those figures from the README.
    assert (db.POSTGRES_POOL_SIZE, db.POSTGRES_MAX_OVERFLOW, BOUND) == (10, 20, 30)


@needs_postgres
def test_engine_opens_at_most_the_bound_then_times_out(
    database_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(db, "POOL_TIMEOUT_S", 0.3)
    engine = db.make_engine(database_url)
    try:
        with ExitStack() as held:
            pids = set()
            for _ in range(BOUND):
                conn = held.enter_context(engine.connect())
                pids.add(conn.execute(text("SELECT pg_backend_pid()")).scalar())
            assert len(pids) == BOUND  # that many real server connections
            started = time.monotonic()
            with pytest.raises(PoolTimeout):
                engine.connect()
            assert time.monotonic() - started < 5
        with engine.connect() as conn:  # handed back: the pool serves again
            assert conn.execute(text("SELECT 1")).scalar() == 1
    finally:
        engine.dispose()


@needs_postgres
def test_a_request_past_the_bound_gets_503_and_the_next_one_succeeds(
    settings: Settings, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(db, "POOL_TIMEOUT_S", 0.3)
    app: Any = create_app(settings)
    with TestClient(app) as client:
        with app.state.session_factory.begin() as session:
            user = auth_service.create_user(session, name="ana", roles=["annotator"], password=None)
            headers = {"Authorization": f"Bearer {auth_service.issue_token(session, user=user)}"}
        engine = app.state.engine
        with ExitStack() as held:
            for _ in range(BOUND):
                held.enter_context(engine.connect())
            busy = client.get("/api/me", headers=headers)
            assert busy.status_code == 503
            assert busy.headers["retry-after"] == "2"
            assert "busy" in busy.json()["detail"]
        assert client.get("/api/me", headers=headers).status_code == 200


def test_sqlite_pool_is_not_capped(tmp_path: Path) -> None:
    engine = db.make_engine(f"sqlite:///{tmp_path / 'store.db'}")
    try:
        assert engine.pool._max_overflow == -1  # type: ignore[attr-defined]
    finally:
        engine.dispose()
