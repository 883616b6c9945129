"""Pages of query results as numpy columns, without a Python object per row.

A Python database driver builds a tuple of Python objects for every row fetched, about 2 µs a
row, which bounded how fast a training set could leave the store. Here a page of rows (a query
bounded by LIMIT) arrives as a few large values that numpy decodes whole:

- PostgreSQL: Apache Arrow's ADBC driver (`adbc-driver-postgresql`) reads the page by binary
  COPY into Arrow columns, in C, on a connection of its own in autocommit (one more connection
  per export in flight, beside the pool; kept for the next pass, `IdleConnections`). Each page
  is read whole, so several row streams can take turns on the connection (it serves one COPY at a time).
- SQLite: the page is folded into one row by aggregates on the session's own connection:
  integers as one comma-separated text, blobs concatenated into one blob (group_concat keeps a
  blob's bytes as they are in a UTF-8 database; the CAST hands them back as a blob). All
  aggregates of a query consume the rows in the same order, so the columns stay aligned. ADBC's
  SQLite driver is not used: it links its own copy of SQLite, and two copies of SQLite in one
  process release each other's POSIX file locks (SQLite's "How To Corrupt An SQLite Database
  File", section 2.2.1), which showed here as "database is locked" on the session's next write.

Callers read only rows that cannot change (pinned by a cut-off on ids), so a PostgreSQL page read
outside the session's transaction is safe. Values go into the SQL text only as integers formatted
by `int_list`: nothing a user typed reaches a query.
"""

from __future__ import annotations

import threading
from abc import ABC, abstractmethod
from collections.abc import Iterable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
from sqlalchemy import text
from sqlalchemy.exc import OperationalError as DBAPIOperationalError
from sqlalchemy.exc import TimeoutError as PoolTimeout
from sqlalchemy.orm import Session

from ..db import POOL_TIMEOUT_S, POSTGRES_BULK_READERS
from .arrow_columns import numbers
from .encode import FLOAT32_LE

_bulk_connections = threading.BoundedSemaphore(POSTGRES_BULK_READERS)

# A column of a page: None for an integer column (int64, shape (n,)), or the width of a column
# of little-endian float32 vectors stored as blobs (float32, shape (n, width)).
ColumnKinds = Mapping[str, int | None]


class BulkReader(ABC):
    """Reads pages of a query as numpy columns; `session` serves everything else."""

    def __init__(self, session: Session) -> None:
        self.session = session

    @abstractmethod
    def page(self, sql: str, columns: ColumnKinds) -> dict[str, np.ndarray]:
        """The rows of `sql` (a SELECT naming exactly `columns`, bounded by LIMIT) by column.

        Raises ValueError naming the column when a value is missing or a vector has another
        width (a damaged store).
        """


class _PostgresReader(BulkReader):
    def __init__(self, session: Session, connection: Any) -> None:
        super().__init__(session)
        self._connection = connection

    @staticmethod
    def run_on(connection: Any, sql: str) -> None:
        """Run a statement that returns no rows."""
        import adbc_driver_manager

        statement = adbc_driver_manager.AdbcStatement(connection)
        try:
            statement.set_sql_query(sql)
            statement.execute_update()
        finally:
            statement.close()

    def page(self, sql: str, columns: ColumnKinds) -> dict[str, np.ndarray]:
        import adbc_driver_manager

        statement = adbc_driver_manager.AdbcStatement(self._connection)
        try:
            statement.set_sql_query(sql)
            stream, _ = statement.execute_query()
            table = pa.RecordBatchReader.from_stream(stream).read_all()
        finally:
            statement.close()
        return {
            name: _arrow_ints(table, name) if width is None else _arrow_vectors(table, name, width)
            for name, width in columns.items()
        }


class _SqliteReader(BulkReader):
    def page(self, sql: str, columns: ColumnKinds) -> dict[str, np.ndarray]:
        # group_concat skips NULLs, so a missing value shows as a short column; a vector of
        # another width shows as a blob of another total length
        folded = ", ".join(
            f"group_concat({name})" if width is None else f"CAST(group_concat({name}, '') AS BLOB)"
            for name, width in columns.items()
        )
        # as driver SQL: every page has its own text, which SQLAlchemy's statement cache would
        # otherwise keep
        found = (
            self.session.connection()
            .exec_driver_sql(f"SELECT count(*), {folded} FROM ({sql})")
            .one()
        )
        rows = int(found[0])
        out: dict[str, np.ndarray] = {}
        for (name, width), joined in zip(columns.items(), found[1:], strict=True):
            values: np.ndarray
            if width is None:
                values = (
                    np.fromstring(joined, dtype=np.int64, sep=",")
                    if joined
                    else np.empty(0, np.int64)
                )
                if len(values) != rows:
                    raise ValueError(f"column {name} has {rows - len(values)} missing values")
            else:
                blob = joined or b""
                if len(blob) != rows * width * FLOAT32_LE.itemsize:
                    raise ValueError(
                        f"column {name} holds a missing vector or one of other than {width} values"
                    )
                values = np.frombuffer(blob, dtype=FLOAT32_LE).reshape(rows, width)
            out[name] = values
        return out


@contextmanager
def bulk_reader(session: Session) -> Iterator[BulkReader]:
    """A reader of the session's database, open for the block."""
    bind = session.get_bind()
    if bind.dialect.name != "postgresql":
        encoding = session.execute(text("PRAGMA encoding")).scalar_one()
        if encoding != "UTF-8":  # group_concat would convert the blobs' bytes
            raise ValueError(f"bulk reads need a UTF-8 SQLite database, not {encoding}")
        yield _SqliteReader(session)
        return
    if not _bulk_connections.acquire(timeout=POOL_TIMEOUT_S):
        # the pool's own timeout error: the app answers 503 with Retry-After
        raise PoolTimeout(f"no bulk-read connection came free within {POOL_TIMEOUT_S:.0f} s")
    try:
        libpq = bind.engine.url.set(drivername="postgresql").render_as_string(hide_password=False)
        with _unreachable_as_sqlalchemy():
            handles = IDLE_CONNECTIONS.take(libpq) or _connect(libpq)
            try:
                yield _PostgresReader(session, handles.connection)
            except GeneratorExit:
                # a stream closed early stops between pages, never inside one: the connection
                # is idle and is kept (Python raises this here only when the stream is closed)
                IDLE_CONNECTIONS.give(handles)
                raise
            except BaseException:
                handles.close()  # whatever failed may have left it broken: never reused
                raise
            else:
                IDLE_CONNECTIONS.give(handles)
    finally:
        _bulk_connections.release()


@dataclass
class _Handles:
    """An ADBC connection to PostgreSQL and the database handle it was opened from."""

    libpq: str
    database: Any
    connection: Any

    def close(self) -> None:
        """Close both, ignoring a connection already broken."""
        import adbc_driver_manager

        for handle in (self.connection, self.database):
            try:
                handle.close()
            except adbc_driver_manager.Error:
                pass


class IdleConnections:
    """Bulk-read connections kept between passes, so that a pass does not pay for a new one.

    Opening an ADBC connection to PostgreSQL took about 50 ms here, a fifth of a rebuilt 100k
    export. Connections are kept for one database (a process serves one store) and only after
    a pass that ended cleanly; a kept one is tried with a statement before it is lent again, and
    one that fails is closed and replaced. Passes hold at most `POSTGRES_BULK_READERS`
    connections at a time, so no more are ever kept.
    """

    def __init__(self) -> None:
        self._idle: list[_Handles] = []
        self._lock = threading.Lock()
        self.opened = 0  # connections opened so far (tests: passes reuse them)

    def take(self, libpq: str) -> _Handles | None:
        """A kept connection to `libpq` that answers, or None (others' are closed)."""
        import adbc_driver_manager

        while True:
            with self._lock:
                mine = [h for h in self._idle if h.libpq == libpq]
                others = [h for h in self._idle if h.libpq != libpq]
                self._idle = mine[:-1]
                handles = mine[-1] if mine else None
            for stale in others:  # another store's: this process has moved on
                stale.close()
            if handles is None:
                return None
            try:
                _PostgresReader.run_on(handles.connection, "SET enable_sort = off")
                return handles
            except adbc_driver_manager.Error:
                handles.close()  # the server closed it (a restart, an idle timeout)

    def give(self, handles: _Handles) -> None:
        with self._lock:
            self._idle.append(handles)

    def close(self) -> None:
        """Close every kept connection (a server shutting down)."""
        with self._lock:
            idle, self._idle = self._idle, []
        for handles in idle:
            handles.close()

    def __len__(self) -> int:
        with self._lock:
            return len(self._idle)


IDLE_CONNECTIONS = IdleConnections()


@contextmanager
def _unreachable_as_sqlalchemy() -> Iterator[None]:
    """The driver's connection failures as SQLAlchemy's, which the app answers with 503."""
    import adbc_driver_manager

    try:
        yield
    except adbc_driver_manager.OperationalError as exc:
        raise DBAPIOperationalError("bulk read (ADBC)", None, exc) from exc


def _connect(libpq: str) -> _Handles:
    # imported here: a server on SQLite never loads the PostgreSQL driver
    import adbc_driver_manager
    import adbc_driver_postgresql

    # the driver's low-level API: its DB-API module imports pandas, some 50 MB of a server
    database = adbc_driver_postgresql.connect(libpq)
    try:
        connection = adbc_driver_manager.AdbcConnection(database)  # in autocommit
    except BaseException:
        database.close()
        raise
    handles = _Handles(libpq, database, connection)
    try:
        # Pages are read along the (round_id, id) index. A freshly filled table has no
        # statistics yet, and the planner may then guess a bitmap scan plus a sort of every
        # remaining row for each page; this connection only ever reads ordered pages.
        _PostgresReader.run_on(connection, "SET enable_bitmapscan = off")
        _PostgresReader.run_on(connection, "SET enable_sort = off")
    except BaseException:
        handles.close()
        raise
    IDLE_CONNECTIONS.opened += 1
    return handles


def int_list(values: Iterable[int]) -> str:
    """Integers as SQL text for an IN (...) list: "1,2,3"."""
    return ",".join(str(int(v)) for v in values)


def _arrow_ints(table: pa.Table, name: str) -> np.ndarray:
    """An integer column as int64, read from its Arrow data buffers."""
    parts = [np.empty(0, np.int64)]
    for chunk in table.column(name).chunks:
        if len(chunk):
            parts.append(numbers(chunk, np.int64, name=f"column {name}", integers=True))
    return np.concatenate(parts)


def _arrow_vectors(table: pa.Table, name: str, width: int) -> np.ndarray:
    """Blobs of `width` float32 values each, read from the Arrow data buffers, (n, width).

    A column of one chunk (a page) is read in place, without a copy.
    """
    parts = []
    for chunk in table.column(name).chunks:
        rows = len(chunk)
        if not rows:
            continue
        if chunk.null_count:
            raise ValueError(f"column {name} has {chunk.null_count} missing values")
        offset_type = np.int64 if pa.types.is_large_binary(chunk.type) else np.int32
        _, offsets_buffer, data = chunk.buffers()
        offsets = np.frombuffer(offsets_buffer, dtype=offset_type)[
            chunk.offset : chunk.offset + rows + 1
        ]
        if not np.all(np.diff(offsets) == width * FLOAT32_LE.itemsize):
            raise ValueError(f"column {name} holds a vector of other than {width} values")
        parts.append(
            np.frombuffer(
                data, dtype=FLOAT32_LE, count=rows * width, offset=int(offsets[0])
            ).reshape(rows, width)
        )
    if len(parts) == 1:
        return parts[0]
    return np.concatenate(parts) if parts else np.empty((0, width), dtype=FLOAT32_LE)
