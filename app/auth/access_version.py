"""Reading the access version: the counter that every change of users, API tokens or browser
sessions bumps (database triggers, migration 0010), compared on every request with the version a
cached identity was read at (app/auth/cache.py).

Every request needs it, so the read is made as cheap as the store allows and never waits. On
both backends a read begun at most FRESH_S before a request arrived answers it too, as every
change waits that long after its commit (app/auth/changes.py), so a steady stream of requests
costs one read per FRESH_S per process, not one per request:

- SQLite: one connection of its own, read on the event loop (a WAL read of one row takes
  microseconds); busy timeout 0, so a locked file answers "busy" at once instead of stalling
  the loop. Read on every request, those microseconds (its file locks and the interpreter's
  caches it leaves cold) were the largest part of what a token-authenticated GET costs beyond
  a bare route: about a third over HTTP (README, "Request overhead");
- PostgreSQL: one asynchronous psycopg connection of its own per event loop, so a request
  waits for the round trip without a thread and without a pool checkout (and its ping).

When the fast read cannot answer (busy, a dropped connection, the store down) `current()` gives
None and the caller takes the slow path: a pooled session in the thread pool that reads the
version and the identity afresh, with the errors (503 and Retry-After) every route has. A failed
PostgreSQL connection is retried after RETRY_AFTER_S, not on every request of an outage.
"""

from __future__ import annotations

import asyncio
import math
import sqlite3
import threading
import time
from typing import Any, Protocol

import psycopg
from sqlalchemy import Connection, Engine, select
from sqlalchemy.orm import Session

from .changes import FRESH_S
from .models import AccessVersion

# By key, not max(version): the cheapest read there is (a missing row reads as 0)
READ_SQL = "SELECT version FROM access_version WHERE id = 1"
RETRY_AFTER_S = 1.0
# A read slower than this gives up its connection and lets the request take the slow path.
READ_TIMEOUT_S = 5.0
CONNECT_TIMEOUT_S = 5
# how the reader's connection shows in pg_stat_activity
APPLICATION_NAME = "expertloop access version"


def read(session: Session | Connection) -> int:
    """The access version, in the caller's transaction (0 while the row is missing)."""
    found = session.scalar(select(AccessVersion.version).where(AccessVersion.id == 1))
    return int(found or 0)


class VersionReader(Protocol):
    async def current(self) -> int | None:
        """The version now, or None when it cannot be read at once (take the slow path)."""

    async def close(self) -> None:
        """Let go of the reader's connection."""


class SqliteReader:
    """One connection of the engine's, set aside, read from the event loop."""

    def __init__(self, engine: Engine) -> None:
        self._engine = engine
        self._conn: Any = None
        self._lock = threading.Lock()  # the loop's thread only, in practice; never waited on
        self._last: tuple[float, int] = (-math.inf, 0)  # latest answered read: begun, answer

    async def current(self) -> int | None:
        # As PostgresReader.current: a read begun at most FRESH_S before this request arrived
        # answers it. The read runs on the loop, so no other request waits for one under way.
        now = time.monotonic()
        begun, answer = self._last
        if begun >= now - FRESH_S:
            return answer
        found = self._read()
        if found is not None:  # busy is a moment's state: the next request tries again
            self._last = (now, found)
        return found

    def _read(self) -> int | None:
        if not self._lock.acquire(blocking=False):
            return None
        try:
            if self._conn is None:
                pooled = self._engine.raw_connection()
                self._conn = pooled.driver_connection
                pooled.detach()  # ours for good: the pool neither lends nor closes it
                self._conn.execute("PRAGMA busy_timeout=0")
            row = self._conn.execute(READ_SQL).fetchone()
            return int(row[0]) if row else 0
        except sqlite3.Error:
            self._drop()
            return None
        finally:
            self._lock.release()

    def _drop(self) -> None:
        if self._conn is not None:
            try:
                self._conn.close()
            except sqlite3.Error:
                pass
            self._conn = None

    async def close(self) -> None:
        with self._lock:
            self._drop()


class PostgresReader:
    """One autocommit psycopg connection per event loop (uvicorn runs one loop per process)."""

    def __init__(self, engine: Engine) -> None:
        # libpq takes the SQLAlchemy URL without its driver name
        self._conninfo = engine.url.set(drivername="postgresql").render_as_string(
            hide_password=False
        )
        self._loop: asyncio.AbstractEventLoop | None = None
        self._conn: psycopg.AsyncConnection[Any] | None = None
        self._turn: asyncio.Lock | None = None  # one read at a time, first come first served
        self._last: tuple[float, int | None] = (-math.inf, None)  # latest read: begun, answer
        self._retry_at = 0.0

    async def current(self) -> int | None:
        loop = asyncio.get_running_loop()
        if loop is not self._loop:
            self._forget()  # a connection belongs to the loop that opened it
            self._loop, self._turn = loop, asyncio.Lock()
            self._last = (-math.inf, None)  # that loop's clock, not this one's
        assert self._turn is not None
        # A read begun at most FRESH_S before this request arrived answers it (changes wait
        # that long after their commit: app/auth/changes.py). Requests arriving while a read is
        # under way wait for it or for the next one: one query at a time per process, however
        # many requests come at once.
        oldest = loop.time() - FRESH_S
        begun, answer = self._last
        if begun >= oldest:
            return answer
        async with self._turn:
            begun, answer = self._last
            if begun >= oldest:  # read for a request ahead in line
                return answer
            begun = loop.time()
            answer = await self._read(loop)
            self._last = (begun, answer)
            return answer

    async def _read(self, loop: asyncio.AbstractEventLoop) -> int | None:
        if loop.time() < self._retry_at:
            return None
        try:
            async with asyncio.timeout(READ_TIMEOUT_S):
                if self._conn is None or self._conn.closed:
                    self._conn = await psycopg.AsyncConnection.connect(
                        self._conninfo,
                        autocommit=True,
                        connect_timeout=CONNECT_TIMEOUT_S,
                        application_name=APPLICATION_NAME,
                    )
                cursor = await self._conn.execute(READ_SQL)
                row = await cursor.fetchone()
        except (psycopg.Error, OSError, TimeoutError):
            self._forget()
            self._retry_at = loop.time() + RETRY_AFTER_S
            return None
        except asyncio.CancelledError:
            self._forget()  # cut off mid-query: the connection's state is unknown
            raise
        return int(row[0]) if row else 0

    def _forget(self) -> None:
        # Closing the socket needs no event loop (the connection's own loop may be gone).
        if self._conn is not None:
            self._conn.pgconn.finish()
            self._conn = None

    async def close(self) -> None:
        conn, self._conn = self._conn, None
        if conn is not None and not conn.closed:
            if asyncio.get_running_loop() is self._loop:
                await conn.close()
            else:
                conn.pgconn.finish()


def make_reader(engine: Engine) -> VersionReader:
    """The fast reader for the engine's backend."""
    if engine.dialect.name == "sqlite":
        return SqliteReader(engine)
    if engine.dialect.name == "postgresql":
        return PostgresReader(engine)
    raise ValueError(f"no access version reader for {engine.dialect.name}")
