"""Bulk insert of steps: binary COPY on PostgreSQL, executemany on SQLite.

Rows are built column-wise from numpy (tolist, void views), a chunk at a time, so memory stays
bounded and no Python loop runs over features.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import numpy as np
from sqlalchemy import Connection

STEP_COLUMNS = (
    "rollout_id",
    "round_id",
    "step_index",
    "time_s",
    "control",
    "features",
    "learner_action",
    "learner_action_vec",
    "expert_action",
    "expert_action_vec",
    "learner_probs",
    "learner_ensemble",
    "ensemble_size",
    "learner_std",
    "scene",
    "image_sha256",
)
# PostgreSQL types of STEP_COLUMNS, for binary COPY
PG_TYPES = (
    "int4",
    "int4",
    "int4",
    "float8",
    "int2",
    "bytea",
    "int4",
    "bytea",
    "int4",
    "bytea",
    "bytea",
    "bytea",
    "int2",
    "bytea",
    "text",
    "text",
)
CHUNK_ROWS = 50_000

Column = np.ndarray | list[Any] | None


def insert_steps(connection: Connection, columns: dict[str, Column], n_rows: int) -> None:
    """Insert n_rows steps given as whole columns (arrays or lists; None = all NULL).

    Columns that are NULL throughout are left out of the statement: fewer values to bind per row.
    """
    missing = set(STEP_COLUMNS) - set(columns)
    if missing:
        raise ValueError(f"step columns missing: {sorted(missing)}")
    names = [name for name in STEP_COLUMNS if columns[name] is not None]
    if connection.dialect.name == "postgresql":
        _copy_postgresql(connection, columns, names, n_rows)
    else:
        placeholders = ", ".join("?" for _ in names)
        sql = f"INSERT INTO steps ({', '.join(names)}) VALUES ({placeholders})"
        for chunk in row_chunks(columns, names, n_rows):
            connection.exec_driver_sql(sql, chunk)


def row_chunks(
    columns: dict[str, Column], names: list[str], n_rows: int
) -> Iterator[list[tuple[Any, ...]]]:
    """Rows of the named columns as tuples, CHUNK_ROWS at a time."""
    for start in range(0, n_rows, CHUNK_ROWS):
        stop = min(start + CHUNK_ROWS, n_rows)
        parts = []
        for name in names:
            values = columns[name]
            if values is None:
                parts.append([None] * (stop - start))
            elif isinstance(values, np.ndarray):
                parts.append(values[start:stop].tolist())
            else:
                parts.append(values[start:stop])
        yield list(zip(*parts, strict=True))


def copy_rows(connection: Connection, table: str, names: list[str], rows: Iterator[Any]) -> None:
    """Binary COPY of row tuples into `table` on PostgreSQL."""
    driver = connection.connection.driver_connection
    assert driver is not None
    types = [PG_TYPES[STEP_COLUMNS.index(name)] for name in names]
    sql = f"COPY {table} ({', '.join(names)}) FROM STDIN (FORMAT BINARY)"
    with driver.cursor() as cursor, cursor.copy(sql) as copy:
        copy.set_types(types)
        for row in rows:
            copy.write_row(row)


def _copy_postgresql(
    connection: Connection, columns: dict[str, Column], names: list[str], n_rows: int
) -> None:
    rows = (row for chunk in row_chunks(columns, names, n_rows) for row in chunk)
    copy_rows(connection, "steps", names, rows)
