"""Engine and sessions. SQLite gets WAL, foreign keys and a busy timeout on every connection."""

from __future__ import annotations

import fcntl
import os
import threading
import weakref
from collections.abc import Iterator
from contextlib import ExitStack, contextmanager
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.orm import Session, sessionmaker
from sqlalchemy.pool import Pool

SQLITE_BUSY_TIMEOUT_MS = 30_000
# SQLite: no cap on pooled connections to the local file (beyond the pool's size they are closed
# on return); SQLite's own locks decide who writes.
SQLITE_POOL_SIZE = 20
SQLITE_POOL_OVERFLOW = -1
# PostgreSQL: an app process opens at most POSTGRES_POOL_SIZE + POSTGRES_MAX_OVERFLOW connections
# (the README's "Scaling" gives this bound for sizing max_connections). A request past the bound
# waits up to POOL_TIMEOUT_S for a connection, then gets 503 with Retry-After. Waiting is safe
# only off the event loop: every store access of a request (sign-in checks included) runs in the
# thread pool, so the loop stays free to finish other requests and hand their connections back.
POSTGRES_POOL_SIZE = 10
POSTGRES_MAX_OVERFLOW = 20
POOL_TIMEOUT_S = 30.0
# PostgreSQL: bulk reads of training-set pages (app/shared/bulk_reads.py) open connections of
# their own beside the pool, at most this many at a time per process; one more waits up to
# POOL_TIMEOUT_S, like a pool checkout.
POSTGRES_BULK_READERS = 10


def _sqlite_pragmas(dbapi_connection: Any, _record: Any) -> None:
    # Python's sqlite3 opens transactions lazily; we take control so that
    # BEGIN IMMEDIATE (queue claims) and plain BEGIN behave as written.
    dbapi_connection.isolation_level = None
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.close()


# Execution option asking for BEGIN IMMEDIATE on SQLite: the transaction takes the write lock
# at its start, so reads inside it cannot go stale before its writes (queue claims rely on it).
# Other backends ignore it; write_transaction below shows the use.
SQLITE_BEGIN_IMMEDIATE = "expertloop_sqlite_begin_immediate"


def _sqlite_begin(conn: Any) -> None:
    immediate = conn.get_execution_options().get(SQLITE_BEGIN_IMMEDIATE, False)
    conn.exec_driver_sql("BEGIN IMMEDIATE" if immediate else "BEGIN")


def make_engine(url: str) -> Engine:
    """Create the engine for a database URL, with our SQLite settings where it applies."""
    if url.startswith("sqlite"):
        path = url.split("///", 1)[-1]
        if path and path != ":memory:":
            Path(path).parent.mkdir(parents=True, exist_ok=True)
        engine = create_engine(
            url,
            connect_args={"check_same_thread": False, "timeout": 30},
            pool_size=SQLITE_POOL_SIZE,
            max_overflow=SQLITE_POOL_OVERFLOW,
        )
        event.listen(engine, "connect", _sqlite_pragmas)
        event.listen(engine, "begin", _sqlite_begin)
        return engine
    engine = create_engine(
        url,
        pool_pre_ping=True,
        pool_size=POSTGRES_POOL_SIZE,
        max_overflow=POSTGRES_MAX_OVERFLOW,
        pool_timeout=POOL_TIMEOUT_S,
    )
    event.listen(engine, "begin", _transaction_begins)
    event.listen(engine, "before_cursor_execute", _statement_runs)
    event.listen(engine, "rollback", _read_transaction_ends)
    return engine


# PostgreSQL: a transaction that only read ends with COMMIT instead of ROLLBACK. psycopg prepares
# a statement on the server once a connection has run it five times, so that later runs skip
# parsing and planning, but it forgets every prepared statement at a ROLLBACK (and has the server
# drop them). Most requests end a read transaction, and closing a session rolls back, so the
# queue's statements were parsed and planned afresh on every run: the database's own CPU per
# label (claim and submit, in process) measured 4.1-4.7 ms with rollbacks and 2.3-2.6 ms with
# commits (README, Benchmarks, Queue). A transaction whose statements were all SELECTs ends the
# same either way; any other statement (a write, a flush, LOCK TABLE) leaves it to roll back.
_READS_ONLY = "expertloop_reads_only"


def _transaction_begins(conn: Any) -> None:
    conn.info[_READS_ONLY] = True


def _statement_runs(conn: Any, _cursor: Any, statement: str, *_: Any) -> None:
    info = conn.info
    if info.get(_READS_ONLY) and statement.lstrip()[:6].upper() != "SELECT":
        info[_READS_ONLY] = False


def _read_transaction_ends(conn: Any) -> None:
    # Runs just before SQLAlchemy's rollback, which then finds no transaction and sends nothing.
    if conn.invalidated:
        return  # a connection found broken (even `info` is out of reach): the rollback copes
    if conn.info.pop(_READS_ONLY, False):
        try:
            conn.connection.dbapi_connection.commit()
        except Exception:  # noqa: BLE001
            # the rollback that follows meets the same fault and handles it (a connection that
            # broke is dropped from the pool there)
            pass


def make_session_factory(engine: Engine) -> sessionmaker[Session]:
    """Session factory bound to an engine; objects stay readable after commit.

    Every table is registered first: a foreign key names its table by string, so a process that
    imported only some table modules (a CLI command) could not flush a row.
    """
    from .models import import_all_tables

    import_all_tables()
    return sessionmaker(bind=engine, expire_on_commit=False)


def make_writer_session_factory(engine: Engine) -> sessionmaker[Session]:
    """Sessions for work that writes: on SQLite every transaction begins IMMEDIATE.

    A deferred SQLite transaction that reads, and then writes after another connection has
    committed, fails at once with "database is locked" (its snapshot is stale), whatever the
    busy timeout. Taking the write lock at BEGIN makes such read-then-write work wait its turn
    instead. Other backends ignore the option.
    """
    if engine.dialect.name != "sqlite":
        return make_session_factory(engine)
    return make_session_factory(engine.execution_options(**{SQLITE_BEGIN_IMMEDIATE: True}))


# One writer lock per SQLite engine, held around every write_transaction. SQLite has one writer
# at a time anyway; waiting on a lock hands the turn over at once, whereas SQLite's own busy
# handler sleeps in growing steps (up to 100 ms) and lets waiting writers convoy. The lock has
# two parts: a thread lock for the process's own threads, then an exclusive flock(2) on a file
# beside the database for the other processes on the same file (a second uvicorn worker, the
# CLI). The kernel wakes a process waiting on flock as soon as the holder lets go. BEGIN
# IMMEDIATE still guards against writers that take neither (sessions of WriterSessionDep).
WRITER_LOCK_SUFFIX = "-writer.lock"


class _SqliteWriterLock:
    """The thread lock, then (for a database file) the cross-process file lock."""

    def __init__(self, database: str | None) -> None:
        self._threads = threading.Lock()
        self._path = None if not database or database == ":memory:" else database
        self._fd: int | None = None

    def __enter__(self) -> None:
        self._threads.acquire()
        if self._path is None:
            return
        try:
            # Opened for each transaction (some microseconds) rather than kept, so that engines
            # made and dropped (tests, CLI commands) leave no descriptor behind; closing it
            # releases the lock too.
            self._fd = os.open(self._path + WRITER_LOCK_SUFFIX, os.O_RDWR | os.O_CREAT, 0o600)
            fcntl.flock(self._fd, fcntl.LOCK_EX)
        except BaseException:
            self._close()
            self._threads.release()
            raise

    def __exit__(self, *exc: object) -> None:
        try:
            self._close()
        finally:
            self._threads.release()

    def _close(self) -> None:
        if self._fd is not None:
            fd, self._fd = self._fd, None
            os.close(fd)


# Keyed by the pool: an engine with execution options (the writer sessions') shares its pool,
# and so its lock, with the engine it was made from.
_sqlite_writers: weakref.WeakKeyDictionary[Pool, _SqliteWriterLock] = weakref.WeakKeyDictionary()
_registry_lock = threading.Lock()


def is_postgresql(session: Session) -> bool:
    """Whether the session's store is PostgreSQL (claims then lock rows and skip locked ones)."""
    return session.get_bind().dialect.name == "postgresql"


def _writer_lock(session: Session) -> _SqliteWriterLock | None:
    bind = session.get_bind()
    if bind.dialect.name != "sqlite":
        return None
    engine = bind if isinstance(bind, Engine) else bind.engine
    with _registry_lock:
        lock = _sqlite_writers.get(engine.pool)
        if lock is None:
            lock = _sqlite_writers[engine.pool] = _SqliteWriterLock(engine.url.database)
        return lock


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
    with ExitStack() as held:
        if lock is not None:
            session.commit()
            held.enter_context(lock)
            session.connection(execution_options={SQLITE_BEGIN_IMMEDIATE: True})
        try:
            yield
            session.commit()
        except BaseException:
            session.rollback()
            raise
