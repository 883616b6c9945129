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
_PG_TYPES = (
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
    """Insert n_rows steps given as whole columns (arrays or lists; None = all NULL)."""
    missing = set(STEP_COLUMNS) - set(columns)
    if missing:
        raise ValueError(f"step columns missing: {sorted(missing)}")
    if connection.dialect.name == "postgresql":
        _copy_postgresql(connection, columns, n_rows)
    else:
        placeholders = ", ".join("?" for _ in STEP_COLUMNS)
        sql = f"INSERT INTO steps ({', '.join(STEP_COLUMNS)}) VALUES ({placeholders})"
        for chunk in _row_chunks(columns, n_rows):
            connection.exec_driver_sql(sql, chunk)


def _row_chunks(columns: dict[str, Column], n_rows: int) -> Iterator[list[tuple[Any, ...]]]:
    for start in range(0, n_rows, CHUNK_ROWS):
        stop = min(start + CHUNK_ROWS, n_rows)
        parts = []
        for name in STEP_COLUMNS:
            values = columns[name]
            if values is None:
                parts.append([None] * (stop - start))
            elif isinstance(values, np.ndarray):
                parts.append(values[start:stop].tolist())
            else:
                parts.append(values[start:stop])
        yield list(zip(*parts, strict=True))


def _copy_postgresql(connection: Connection, columns: dict[str, Column], n_rows: int) -> None:
    driver = connection.connection.driver_connection
    assert driver is not None
    sql = f"COPY steps ({', '.join(STEP_COLUMNS)}) FROM STDIN (FORMAT BINARY)"
    with driver.cursor() as cursor, cursor.copy(sql) as copy:
        copy.set_types(list(_PG_TYPES))
        for chunk in _row_chunks(columns, n_rows):
            for row in chunk:
                copy.write_row(row)
