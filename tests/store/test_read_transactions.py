"""How a transaction ends on PostgreSQL: one that only read ends with COMMIT, so psycopg keeps
the statements it prepared on the connection (a ROLLBACK makes it forget them all); one that
wrote anything is still rolled back when its session closes without committing (app/db.py)."""

from __future__ import annotations

from collections.abc import Callable, Iterator

import pytest
from sqlalchemy import Engine, func, insert, select, text
from sqlalchemy.exc import DBAPIError
from sqlalchemy.orm import Session

from expertloop.auth.models import User
from expertloop.db import make_engine, make_session_factory
from tests.conftest import PG_URL

needs_postgres = pytest.mark.skipif(not PG_URL, reason="prepared statements are psycopg's")


@pytest.fixture
def store(database_url: str) -> Iterator[Engine]:
    engine = make_engine(database_url)
    yield engine
    engine.dispose()


def _users(engine: Engine) -> int:
    with make_session_factory(engine)() as session:
        return int(session.scalar(select(func.count()).select_from(User)) or 0)


@needs_postgres
def test_read_transactions_keep_the_prepared_statements(store: Engine) -> None:
    sessions = make_session_factory(store)
    backends = set()
    # psycopg prepares a statement once a connection has run it five times (prepare_threshold)
    for _ in range(6):
        with sessions() as session:  # closed in its read transaction: ends it
            session.execute(select(User.id).where(User.name == "nobody")).all()
            backends.add(session.scalar(text("SELECT pg_backend_pid()")))
    with sessions() as session:
        backends.add(session.scalar(text("SELECT pg_backend_pid()")))
        prepared = session.scalar(
            text(
                "SELECT count(*) FROM pg_prepared_statements "
                "WHERE statement LIKE 'SELECT users.id%'"
            )
        )
    assert len(backends) == 1, "the sessions did not share the one pooled connection"
    assert prepared == 1


WRITES: dict[str, Callable[[Session], object]] = {
    "ORM flush": lambda s: (s.add(User(name="written", roles=[])), s.flush()),
    "Core insert": lambda s: s.execute(insert(User).values(name="written", roles=[])),
    "text insert": lambda s: s.execute(
        text(
            "INSERT INTO users (name, roles, created_at, active) VALUES ('written', '[]', "
            "CURRENT_TIMESTAMP, true)"
        )
    ),
}


@pytest.mark.parametrize("write", WRITES, ids=list(WRITES))
def test_a_transaction_that_wrote_is_rolled_back_at_close(store: Engine, write: str) -> None:
    with make_session_factory(store)() as session:
        session.execute(select(User.id)).all()  # reads first, then writes
        WRITES[write](session)
        session.execute(select(User.id)).all()  # and reads again
    assert _users(store) == 0


def test_a_failed_read_leaves_the_connection_usable(store: Engine) -> None:
    sessions = make_session_factory(store)
    with sessions() as session:
        session.execute(select(User.id)).all()
        if PG_URL:
            with pytest.raises(DBAPIError, match="division by zero"):
                session.execute(text("SELECT 1 / (SELECT count(*) FROM users)"))
    for _ in range(3):
        with sessions() as session:
            assert session.scalar(select(func.count()).select_from(User)) == 0
            session.add(User(name="after", roles=[]))
            session.commit()
            session.execute(select(User.id).where(User.name == "after")).all()
        with sessions() as session:
            session.execute(text("DELETE FROM users"))
            session.commit()


@needs_postgres
def test_a_connection_lost_in_a_read_transaction_rolls_back_cleanly(store: Engine) -> None:
    # the store restarting under a read: SQLAlchemy invalidates the connection, and ending the
    # transaction must leave that to it (a listener touching the connection raised instead)
    sessions = make_session_factory(store)
    with sessions() as session:
        pid = session.scalar(text("SELECT pg_backend_pid()"))
        with store.connect() as other:
            other.execute(text("SELECT pg_terminate_backend(:pid)"), {"pid": pid})
        with pytest.raises(DBAPIError) as lost:
            session.execute(select(User.id)).all()
        assert lost.value.connection_invalidated
        session.rollback()
    assert _users(store) == 0


@needs_postgres
def test_a_connection_lost_at_the_end_of_a_read_transaction(store: Engine) -> None:
    # lost after the last statement: the COMMIT that ends the read fails, and the rollback that
    # follows reports the connection as gone (the request's close ignores exactly that)
    sessions = make_session_factory(store)
    session = sessions()
    pid = session.scalar(text("SELECT pg_backend_pid()"))
    with store.connect() as other:
        other.execute(text("SELECT pg_terminate_backend(:pid)"), {"pid": pid})
    try:
        session.close()
    except DBAPIError as exc:
        assert exc.connection_invalidated
    with sessions() as fresh:  # the pool hands out a working connection
        assert fresh.scalar(select(func.count()).select_from(User)) == 0
