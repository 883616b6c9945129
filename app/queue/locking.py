"""Write transactions for the queue: row locks on PostgreSQL, BEGIN IMMEDIATE on SQLite."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy.orm import Session

from app.db import SQLITE_BEGIN_IMMEDIATE


def is_postgresql(session: Session) -> bool:
    """Whether the session's store is PostgreSQL (claims then lock rows and skip locked ones)."""
    return session.get_bind().dialect.name == "postgresql"


@contextmanager
def write_transaction(session: Session) -> Iterator[None]:
    """Run the block in its own transaction, committed at the end and rolled back on error.

    The caller's open transaction is committed first: on SQLite a read transaction begun earlier
    (for instance by the sign-in check) could not take the write lock later without failing, so
    the block starts a fresh one with BEGIN IMMEDIATE, which waits for the write lock up front.
    On PostgreSQL the block locks the rows it decides on (SELECT ... FOR UPDATE).
    """
    session.commit()
    session.connection(execution_options={SQLITE_BEGIN_IMMEDIATE: True})
    try:
        yield
        session.commit()
    except BaseException:
        session.rollback()
        raise
