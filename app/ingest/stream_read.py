"""Read a rollout file of any accepted format as a stream of Arrow tables of bounded size.

The whole-file reader (`formats.read_table`) holds every row at once; this one yields tables of
about `batch_bytes` decoded (and at most `max_rows` rows), so an upload's memory does not grow
with its size. The checks and messages are the whole-file reader's: the declared decoded size
of Parquet and `.npz` files (413) before anything is decompressed, dictionary-encoded text
counted as decoded, JSON Lines refused by the line. Every table has the same columns in the
same order, except for JSON Lines, whose lines may name columns first seen late in the file.
"""

from __future__ import annotations

import contextlib
import itertools
import tempfile
import zipfile
import zlib
from collections.abc import Generator, Iterator
from pathlib import Path
from typing import IO, Any

import numpy as np
import numpy.lib.format as npformat
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..errors import InvalidInput
from ..limits import shown
from ..shared.contract import FORMATS
from .formats import (
    DEFAULT_MAX_ARRAY_BYTES,
    NPY_MAX_HEADER_BYTES,
    _decode_dictionaries,
    _decoded_bytes,
    _kind,
    _mixed_types,
    _npz_column,
    _too_large,
    checked_npz_headers,
    dictionary_text_columns,
    jsonl_lines,
)

# A table of about this many bytes once decoded: large enough that per-table costs vanish,
# small enough that a few of them (read, validated, written) stay far below the memory bound.
BATCH_BYTES = 4 << 20
MAX_BATCH_ROWS = 32_768
# Parquet read buffer for all columns together (pyarrow otherwise reads a whole column chunk,
# which a file written as one row group makes as large as the file).
PARQUET_BUFFER_BYTES = 8 << 20
# What the readers of the columns read together may hold at once. A column's reader holds its
# current page, compressed and decoded, and its dictionary: its whole chunk when the chunk is
# small, else about PARQUET_COLUMN_HOLD_BYTES (the usual writers, pyarrow's and Spark's, cut
# pages and dictionaries at 1 MB). Thousands of columns in one large row group would hold far
# more than the bound, so such a file is read a group of columns at a time (_by_column_groups).
PARQUET_READERS_BYTES = 64 << 20
PARQUET_COLUMN_HOLD_BYTES = 3 << 20


def iter_tables(
    path: Path,
    file_format: str,
    *,
    max_array_bytes: int = DEFAULT_MAX_ARRAY_BYTES,
    batch_bytes: int | None = None,
    max_rows: int | None = None,
    scratch: Path | None = None,
) -> Generator[pa.Table, None, None]:
    """The file's rows as tables of bounded size, in file order; refusals as `read_table`'s.
    `batch_bytes` and `max_rows` default to BATCH_BYTES and MAX_BATCH_ROWS. A Parquet file
    read a group of columns at a time spills its decoded columns to a temporary folder in
    `scratch` (default: the file's folder), removed when the iterator ends or is closed."""
    batch_bytes = BATCH_BYTES if batch_bytes is None else batch_bytes
    max_rows = MAX_BATCH_ROWS if max_rows is None else max_rows
    if path.stat().st_size == 0:
        raise InvalidInput("the file is empty")
    if file_format == "parquet":
        tables = _parquet_tables(path, max_array_bytes, batch_bytes, max_rows, scratch)
    elif file_format == "npz":
        tables = _npz_tables(path, max_array_bytes, batch_bytes, max_rows)
    elif file_format == "jsonl":
        tables = _jsonl_tables(path, batch_bytes, max_rows)
    else:
        raise InvalidInput(f"unknown format '{shown(file_format)}'; use one of {list(FORMATS)}")
    rows = 0
    for table in tables:
        if table.num_rows:
            rows += table.num_rows
            yield table
    if rows == 0:
        raise InvalidInput("the file holds no rows")


def _parquet_tables(
    path: Path, max_array_bytes: int, batch_bytes: int, max_rows: int, scratch: Path | None
) -> Iterator[pa.Table]:
    # As formats._read_parquet: messages never repeat pyarrow's. Not memory-mapped: a mapped
    # file's pages count as the server's resident memory.
    try:
        parquet = pq.ParquetFile(path, memory_map=False)
        metadata = parquet.metadata
        text = dictionary_text_columns(parquet, max_array_bytes)
        columns = max(1, metadata.num_columns)
        parquet = pq.ParquetFile(
            path,
            memory_map=False,
            read_dictionary=text,
            buffer_size=max(8 << 10, PARQUET_BUFFER_BYTES // columns),
            pre_buffer=False,
        )
        rows = _parquet_batch_rows(metadata, batch_bytes, max_rows)
        groups = _column_groups(parquet)
        with contextlib.ExitStack() as spilled:
            if len(groups) == 1:
                batches = parquet.iter_batches(rows, use_threads=False)
                tables = (pa.Table.from_batches([batch]) for batch in batches)
            else:
                folder = spilled.enter_context(
                    tempfile.TemporaryDirectory(dir=scratch or path.parent)
                )
                tables = _by_column_groups(parquet, groups, rows, Path(folder))
                spilled.callback(tables.close)  # its open streams, before the folder goes
            read_bytes = 0
            for table in tables:
                decoded = _decoded_bytes(table)
                read_bytes += decoded
                if read_bytes > max_array_bytes:
                    raise _too_large("the Parquet file", read_bytes, max_array_bytes)
                yield from _decoded_slices(table, decoded, batch_bytes)
    except (pa.ArrowException, OSError) as exc:
        raise InvalidInput("not a readable Parquet file (truncated or damaged?)") from exc


def _column_groups(parquet: pq.ParquetFile) -> list[list[str]]:
    """The file's column names, in file order, in groups whose readers may hold at most about
    PARQUET_READERS_BYTES at once in any row group (one group for most files). Columns of one
    name (a file the checks will refuse) go together: pyarrow selects them all by the name."""
    metadata = parquet.metadata
    fields = parquet.schema_arrow
    leaves = [_leaf_columns(field.type) for field in fields]
    if sum(leaves) != metadata.num_columns:  # a type whose leaves we do not count: read at once
        return [list(dict.fromkeys(fields.names))]
    held = np.zeros(metadata.num_columns)  # each leaf column's most in any row group
    for i in range(metadata.num_row_groups):
        group = metadata.row_group(i)
        for j in range(group.num_columns):
            chunk = group.column(j)
            size = chunk.total_compressed_size + chunk.total_uncompressed_size
            held[j] = max(held[j], min(size, PARQUET_COLUMN_HOLD_BYTES))
    by_name: dict[str, float] = {}
    ends = np.cumsum(leaves)
    for field, count, end in zip(fields, leaves, ends, strict=True):
        by_name[field.name] = by_name.get(field.name, 0.0) + float(held[end - count : end].sum())
    groups: list[list[str]] = [[]]
    size = 0.0
    for name, bytes_held in by_name.items():
        if groups[-1] and size + bytes_held > PARQUET_READERS_BYTES:
            groups.append([])
            size = 0.0
        groups[-1].append(name)
        size += bytes_held
    return groups


def _leaf_columns(kind: pa.DataType) -> int:
    """Parquet columns an Arrow field of this type is stored as."""
    if pa.types.is_struct(kind):
        return sum(_leaf_columns(kind.field(i).type) for i in range(kind.num_fields))
    if pa.types.is_map(kind):
        return _leaf_columns(kind.key_type) + _leaf_columns(kind.item_type)
    if (
        pa.types.is_list(kind)
        or pa.types.is_large_list(kind)
        or pa.types.is_fixed_size_list(kind)
        or pa.types.is_list_view(kind)
        or pa.types.is_large_list_view(kind)
    ):
        return _leaf_columns(kind.value_type)
    return 1


def _by_column_groups(
    parquet: pq.ParquetFile, groups: list[list[str]], rows: int, folder: Path
) -> Generator[pa.Table, None, None]:
    """Tables of `rows` rows with every column, each row group read one group of columns at a
    time: a group's batches are written to an Arrow IPC stream in `folder`, then the streams
    are read back together a batch at a time. Only one group's column readers are open at
    once; the row group's decoded columns go through the disk once."""
    for r in range(parquet.metadata.num_row_groups):
        if parquet.metadata.row_group(r).num_rows == 0:
            continue
        paths = [folder / f"row-group-{r}-columns-{k}.arrows" for k in range(len(groups))]
        for names, spill in zip(groups, paths, strict=True):
            batches = parquet.iter_batches(rows, row_groups=[r], columns=names, use_threads=False)
            first = next(batches, None)
            if first is None:
                raise OSError("a row group with rows gave none")
            with pa.OSFile(str(spill), "wb") as sink, pa.ipc.new_stream(sink, first.schema) as out:
                out.write_batch(first)
                for batch in batches:
                    out.write_batch(batch)
        streams = [pa.OSFile(str(spill), "rb") for spill in paths]
        try:
            for parts in itertools.zip_longest(*(pa.ipc.open_stream(s) for s in streams)):
                if None in parts or len({part.num_rows for part in parts}) != 1:
                    raise OSError("the column groups of a row group have different lengths")
                yield pa.Table.from_arrays(
                    [column for part in parts for column in part.columns],
                    names=[name for part in parts for name in part.schema.names],
                )
        finally:
            for stream in streams:
                stream.close()
            for spill in paths:
                spill.unlink()


def _parquet_batch_rows(metadata: pq.FileMetaData, batch_bytes: int, max_rows: int) -> int:
    """Rows a batch may have so that its declared size is about `batch_bytes`, judged by the
    row group declaring the most bytes a row."""
    widest = 1.0
    for i in range(metadata.num_row_groups):
        group = metadata.row_group(i)
        if group.num_rows:
            size = sum(
                max(group.column(j).total_uncompressed_size, group.column(j).num_values * 4)
                for j in range(group.num_columns)
            )
            widest = max(widest, size / group.num_rows)
    return int(min(max_rows, max(1, batch_bytes // widest)))


def _decoded_slices(table: pa.Table, decoded: int, batch_bytes: int) -> Iterator[pa.Table]:
    """The table with its dictionary columns decoded, in row slices of about `batch_bytes`:
    a few rows of one long value repeated decode to far more than they take as a dictionary.
    `decoded`: the table's size once decoded (`_decoded_bytes`, counted once a table, which
    for thousands of columns is no small cost)."""
    dictionaries = any(pa.types.is_dictionary(kind) for kind in table.schema.types)
    if not dictionaries or decoded <= 2 * batch_bytes:
        yield _decode_dictionaries(table)
        return
    per_row = np.full(table.num_rows, 0.0)
    for column in table.columns:
        if not pa.types.is_dictionary(column.type):
            per_row += column.nbytes / max(1, table.num_rows)
            continue
        chunk = column.combine_chunks()
        lengths = pc.binary_length(chunk.dictionary).to_numpy(zero_copy_only=False)
        indices = chunk.indices.fill_null(0).to_numpy(zero_copy_only=False)
        per_row += 4 + (lengths[indices] if len(lengths) else 0)
    ends = np.cumsum(per_row)
    start = 0
    while start < table.num_rows:
        base = ends[start - 1] if start else 0.0
        stop = int(np.searchsorted(ends, base + batch_bytes, side="right"))
        stop = min(table.num_rows, max(stop, start + 1))
        yield _decode_dictionaries(table.slice(start, stop - start))
        start = stop


def _npz_tables(
    path: Path, max_array_bytes: int, batch_bytes: int, max_rows: int
) -> Iterator[pa.Table]:
    """Row slices of every member at once, each member read as a stream of its .npy data (a
    member whose rows are not contiguous, Fortran-ordered with 2 or 3 dimensions, is read
    whole)."""
    try:
        with zipfile.ZipFile(path) as archive:
            headers = checked_npz_headers(archive, max_array_bytes)
            n_rows = headers[0].shape[0]
            row_bytes = max(1, sum(h.n_bytes // max(1, h.shape[0]) for h in headers))
            rows = int(min(max_rows, max(1, batch_bytes // row_bytes)))
            members = [_NpyMember(archive, h.name) for h in headers]
            try:
                for start in range(0, n_rows, rows):
                    take = min(rows, n_rows - start)
                    yield pa.table({m.name: _npz_column(m.name, m.read(take)) for m in members})
            finally:
                for member in members:
                    member.close()
    except (ValueError, OSError, zipfile.BadZipFile, EOFError, zlib.error) as exc:
        raise InvalidInput(
            "not a readable .npz file (truncated, damaged or not a zip of .npy)"
        ) from exc


class _NpyMember:
    """One .npy member of an open .npz, read a number of rows at a time."""

    def __init__(self, archive: zipfile.ZipFile, name: str) -> None:
        self.name = name
        self.stream: IO[bytes] = archive.open(name + ".npy")
        version = npformat.read_magic(self.stream)
        read_header = (
            npformat.read_array_header_1_0 if version == (1, 0) else npformat.read_array_header_2_0
        )
        shape, fortran, dtype = read_header(self.stream, NPY_MAX_HEADER_BYTES)
        self.shape: tuple[int, ...] = tuple(shape)
        self.dtype: np.dtype[Any] = dtype
        self.row_items = int(np.prod(self.shape[1:], dtype=np.int64))
        self.whole: np.ndarray | None = None
        self.position = 0
        if fortran and len(self.shape) > 1:
            count = int(np.prod(self.shape, dtype=np.int64))
            data = self._read_exactly(count * dtype.itemsize)
            self.whole = np.frombuffer(data, dtype).reshape(self.shape, order="F")

    def _read_exactly(self, n_bytes: int) -> bytes:
        data = self.stream.read(n_bytes)
        if len(data) != n_bytes:
            raise EOFError("the member ends early")
        return data

    def read(self, rows: int) -> np.ndarray:
        if self.whole is not None:
            part = self.whole[self.position : self.position + rows]
            self.position += rows
            return np.ascontiguousarray(part)
        data = self._read_exactly(rows * self.row_items * self.dtype.itemsize)
        return np.frombuffer(data, self.dtype).reshape((rows, *self.shape[1:]))

    def close(self) -> None:
        self.stream.close()


def _jsonl_tables(path: Path, batch_bytes: int, max_rows: int) -> Iterator[pa.Table]:
    """Lines in groups of at most `max_rows` rows or about `batch_bytes` of text. Every table
    has every column named so far (in order of first appearance, null where a line leaves it
    out), as the whole file's table would; a column whose kind of value differs from an
    earlier group's is refused as the whole-file reader refuses it, naming the line."""
    names: dict[str, None] = {}
    first: dict[str, tuple[str, int]] = {}  # column -> kind of its first value, and its line
    types: dict[str, pa.DataType] = {}  # column -> its first non-null Arrow type
    rows: list[dict[str, Any]] = []
    lines: list[int] = []
    held = 0
    for line_number, row, size in jsonl_lines(path):
        rows.append(row)
        lines.append(line_number)
        held += size
        if len(rows) >= max_rows or held >= batch_bytes:
            yield _jsonl_table(rows, lines, names, first, types)
            rows, lines, held = [], [], 0
    if rows:
        yield _jsonl_table(rows, lines, names, first, types)


def _jsonl_table(
    rows: list[dict[str, Any]],
    lines: list[int],
    names: dict[str, None],
    first: dict[str, tuple[str, int]],
    types: dict[str, pa.DataType],
) -> pa.Table:
    for row in rows:
        names.update(dict.fromkeys(row))
    try:
        table = pa.Table.from_pydict({name: [row.get(name) for row in rows] for name in names})
    except (pa.ArrowException, TypeError, OverflowError) as exc:
        raise InvalidInput(_mixed_types(rows, lines, dict(first))) from exc
    for name in names:
        column = table[name]
        if column.null_count == len(column):
            known = types.get(name)
            if known is not None and pa.types.is_null(column.type):
                # the whole file's column has the type earlier lines gave it
                table = table.set_column(
                    table.column_names.index(name), name, pa.nulls(len(column), known)
                )
            continue
        types.setdefault(name, column.type)
        i = int(pc.index(column.is_valid(), True).as_py())
        kind = _kind(rows[i][name])
        seen = first.setdefault(name, (kind, lines[i]))
        if kind != seen[0] and not (kind == "list" or seen[0] == "list"):
            raise InvalidInput(_mixed_types(rows, lines, dict(first)))
    return table
