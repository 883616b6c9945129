"""Write transactions for the queue: row locks on PostgreSQL, BEGIN IMMEDIATE on SQLite."""

from __future__ import annotations

import threading
import weakref
from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy import Engine
from sqlalchemy.orm import Session

from app.db import SQLITE_BEGIN_IMMEDIATE

# One lock per SQLite engine. SQLite has one writer at a time anyway; waiting on this lock hands
# the turn over at once, whereas SQLite's own busy handler sleeps in growing steps (up to 100 ms)
# and lets 32 waiting writers convoy. BEGIN IMMEDIATE still guards against other processes.
_sqlite_writers: weakref.WeakKeyDictionary[Engine, threading.Lock] = weakref.WeakKeyDictionary()
_registry_lock = threading.Lock()


def is_postgresql(session: Session) -> bool:
    """Whether the session's store is PostgreSQL (claims then lock rows and skip locked ones)."""
    return session.get_bind().dialect.name == "postgresql"


def _writer_lock(session: Session) -> threading.Lock | None:
    bind = session.get_bind()
    if bind.dialect.name != "sqlite":
        return None
    engine = bind if isinstance(bind, Engine) else bind.engine
    with _registry_lock:
        return _sqlite_writers.setdefault(engine, threading.Lock())


@contextmanager
def write_transaction(session: Session) -> Iterator[None]:
    """Run the block in a transaction that is committed at its end and rolled back on error.

    SQLite: the caller's open transaction is committed first, because a read transaction begun
    earlier (for instance by the sign-in check) could not take the write lock later; the block
    then starts with BEGIN IMMEDIATE, which takes the write lock up front. PostgreSQL: the block
    continues the session's transaction (READ COMMITTED reads afresh in every statement) and
    locks the rows it decides on with SELECT ... FOR UPDATE.
    """
    lock = _writer_lock(session)
    if lock is None:
        try:
            yield
            session.commit()
        except BaseException:
            session.rollback()
            raise
        return
    session.commit()
    with lock:
        session.connection(execution_options={SQLITE_BEGIN_IMMEDIATE: True})
        try:
            yield
            session.commit()
        except BaseException:
            session.rollback()
            raise
