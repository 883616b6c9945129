"""Streaming writers of training-set rows: Apache Parquet, NumPy .npz and JSON Lines.

Each writer takes an iterator of RowBatch and yields the file's bytes a piece at a time, so a
response can stream any number of rows in bounded memory:

- Parquet: one row group per batch, written by pyarrow's ParquetWriter into a sink that hands
  over its bytes after every row group; the footer, with the metadata, follows the last batch.
- .npz: a zip of .npy members, one per column. A zip holds its members one after another, so the
  single pass over the rows spools each column to a temporary file first (bounded memory, disk
  proportional to the rows); the members are then copied out in chunks. Text columns are spooled
  as int32 codes into a small table of distinct values, so their fixed string width is known when
  the member is written. Rows that are already stored by column (a version's Parquet file,
  app.snapshots.stored_rows) go into the archive (`npz_archive`) a column at a time instead.
- JSON Lines: one object per row, its keys the columns below in their order, written by orjson
  a batch of lines at a time. Floats are written as the exact decimal value of the stored
  float32 (e.g. 0.10000000149011612: the shortest text of that value as a float64), so casting
  back to float32 returns the stored bits. The text is orjson's, not Python's ``json.dumps``:
  no spaces (``{"step":1}``, not ``{"step": 1}``), exponents in its own style (``0.00001``, not
  ``1e-05``) and non-ASCII characters as UTF-8 (not ``\\u00e9``); any JSON reader parses the same
  values from both. The store holds finite numbers only (ingest and answers refuse NaN and
  infinity, which JSON cannot write); a row holding one stops the export. Stored names hold no
  line or paragraph separator, so every line ends at its "\\n" alone.

Columns, in this order, in every format:

=================  ===========================================================================
``step_id``        int64, the state's id in the store (identifies rows across versions)
``features``       float32 per feature, in the loop's feature order
``expert_action``  discrete: int64 index into the loop's action list (names in the manifest);
                   continuous: float32 per action dimension
``round``          int64 round number of the step
``source``         "demonstration", "takeover" or "relabel"
``learner_version`` learner version of the step's round ("" in .npz when none)
``rollout``        rollout key
``step``           int64 step index within the rollout
``label_count``    int64 answers behind the action (1 for expert-driven steps)
``agreement``      float64 consensus agreement (1.0 for expert-driven steps)
=================  ===========================================================================
"""

from __future__ import annotations

import base64
import io
import json
import tempfile
import zipfile
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from functools import partial
from pathlib import Path
from typing import IO, Any

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..loops.spec import LoopSpec
from ..shared.overlap import alongside, mapped_ahead
from ..shared.row_batches import RowBatch
from ..shared.training_set import SOURCES

EXPORT_FORMATS = ("parquet", "npz", "jsonl")
MEDIA_TYPES = {
    "parquet": "application/vnd.apache.parquet",
    "npz": "application/octet-stream",
    "jsonl": "application/x-ndjson",
}
COLUMNS = (
    "step_id",
    "features",
    "expert_action",
    "round",
    "source",
    "learner_version",
    "rollout",
    "step",
    "label_count",
    "agreement",
)
PARQUET_COMPRESSION = "snappy"
# Dictionary encoding pays only for the text columns: on float vectors the writer would fill a
# dictionary page, give up and fall back, costing time and bytes.
PARQUET_DICTIONARY_COLUMNS = ["source", "learner_version", "rollout"]
METADATA_KEY = "expertloop"
# where Arrow keeps a file's Arrow schema in Parquet key-value metadata
_ARROW_SCHEMA_KEY = "ARROW:schema"
# Exports allocate through the C library's allocator: pyarrow's default pool keeps freed pages
# for reuse, which leaves a server's resident memory some 40 MB higher after each export.
_MEMORY_POOL = pa.system_memory_pool()
# zip members carry a fixed time stamp so that re-exports are byte-identical
_ZIP_TIME = (1980, 1, 1, 0, 0, 0)
_COPY_BYTES = 4 * 1024 * 1024
# an .npz answer's pieces gather small parts up to this size: each piece is a chunk the server
# sends, while a larger threshold joins parts into copies that cost memory
_PIECE_BYTES = 1024 * 1024
# batches handed to the encoding thread, and chunks to the stored file's thread, at a time
ENCODE_AHEAD = 1
COPY_AHEAD = 1


class _Sink(io.RawIOBase):
    """A write-only file that keeps what was written until `take` hands it over."""

    def __init__(self) -> None:
        super().__init__()
        self._parts: list[bytes] = []
        self.pending = 0  # bytes written since the last `take`

    def writable(self) -> bool:
        return True

    def write(self, data: Any) -> int:
        chunk = bytes(data)
        self._parts.append(chunk)
        self.pending += len(chunk)
        return len(chunk)

    def take(self) -> bytes:
        parts, self._parts = self._parts, []
        self.pending = 0
        return b"".join(parts)


def arrow_schema(spec: LoopSpec, metadata: dict[str, Any] | None = None) -> pa.Schema:
    """Arrow schema of the export columns; `metadata` is stored as JSON under "expertloop"."""
    action = pa.int64() if spec.is_discrete else pa.list_(pa.float32(), spec.action_width)
    schema = pa.schema(
        [
            ("step_id", pa.int64()),
            ("features", pa.list_(pa.float32(), spec.n_features)),
            ("expert_action", action),
            ("round", pa.int64()),
            ("source", pa.string()),
            ("learner_version", pa.string()),
            ("rollout", pa.string()),
            ("step", pa.int64()),
            ("label_count", pa.int64()),
            ("agreement", pa.float64()),
        ]
    )
    if metadata is not None:
        schema = schema.with_metadata({METADATA_KEY: json.dumps(metadata, sort_keys=True)})
    return schema


# Arrays are built from numpy buffers: pa.array() on numpy input would import pandas, which
# costs a server about 50 MB of memory for nothing.
def _numeric(values: np.ndarray, dtype: str) -> pa.Array:
    data = np.ascontiguousarray(values, dtype=dtype)
    arrow_type = pa.from_numpy_dtype(data.dtype)
    return pa.Array.from_buffers(arrow_type, len(data), [None, pa.py_buffer(data)])


def _fixed_list(values: np.ndarray, width: int) -> pa.Array:
    flat = _numeric(values.reshape(-1), "<f4")
    return pa.FixedSizeListArray.from_arrays(flat, width)


def _named(codes: np.ndarray, names: list[str | None]) -> pa.Array:
    """Strings from small int codes and their table, without a Python loop over rows."""
    encoded = [b"" if name is None else name.encode("utf-8") for name in names]
    offsets = np.zeros(len(encoded) + 1, dtype=np.int32)
    offsets[1:] = np.cumsum([len(e) for e in encoded])
    present = np.array([name is not None for name in names], dtype=bool)
    validity = None if present.all() else pa.py_buffer(np.packbits(present, bitorder="little"))
    table = pa.Array.from_buffers(
        pa.string(),
        len(names),
        [validity, pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))],
    )
    return pc.take(table, _numeric(codes, "<i8"), memory_pool=_MEMORY_POOL)


def to_record_batch(batch: RowBatch, spec: LoopSpec, schema: pa.Schema) -> pa.RecordBatch:
    """The export columns of a batch as an Arrow record batch."""
    if batch.features is None:
        raise ValueError("an export needs the features of every row")
    rollouts, rollout_code = np.unique(batch.rollout_id, return_inverse=True)
    rounds, round_code = np.unique(batch.round, return_inverse=True)
    action = (
        _numeric(batch.action, "<i8")
        if spec.is_discrete
        else _fixed_list(batch.action, spec.action_width)
    )
    columns = [
        _numeric(batch.step_id, "<i8"),
        _fixed_list(batch.features, spec.n_features),
        action,
        _numeric(batch.round, "<i8"),
        _named(batch.source, list(SOURCES)),
        _named(round_code, [batch.learner_versions.get(r) for r in rounds.tolist()]),
        _named(rollout_code, [batch.rollout_keys[i] for i in rollouts.tolist()]),
        _numeric(batch.step_index, "<i8"),
        _numeric(batch.label_count, "<i8"),
        _numeric(batch.agreement, "<f8"),
    ]
    return pa.RecordBatch.from_arrays(columns, schema=schema)


class ParquetRows:
    """A Parquet file written a row group per batch, its metadata given only at the end.

    The manifest of a new version (its content hash, row counts) is known only after its last
    row, so the file can be written in the same pass that hashes the rows only if the metadata
    waits for the footer. Parquet keeps key-value metadata in the footer anyway; pyarrow's
    writer takes it with the schema up front, so here the schema goes in without it
    (`store_schema=False`) and the footer gets both entries pyarrow would have written: our
    key, and under "ARROW:schema" the schema with that metadata, serialized as Arrow IPC and
    base64-encoded (the Arrow/Parquet convention readers restore types from). The bytes equal
    pyarrow's own writer given the metadata up front (tests/snapshots/test_export.py).
    """

    def __init__(self, spec: LoopSpec) -> None:
        self._spec = spec
        self._schema = arrow_schema(spec)
        self._sink = _Sink()
        self._writer = pq.ParquetWriter(
            self._sink,
            self._schema,
            compression=PARQUET_COMPRESSION,
            use_dictionary=PARQUET_DICTIONARY_COLUMNS,
            memory_pool=_MEMORY_POOL,
            store_schema=False,
        )

    def write(self, batch: RowBatch) -> bytes:
        """Encode a batch as one row group; the bytes written (one chunk per row group: each
        chunk costs a trip through the server)."""
        self._writer.write_batch(to_record_batch(batch, self._spec, self._schema))
        return self._sink.take()

    def close(self, metadata: dict[str, Any]) -> bytes:
        """The footer, carrying `metadata` as JSON under "expertloop"; the file is complete."""
        full = arrow_schema(self._spec, metadata)
        assert full.metadata is not None
        self._writer.add_key_value_metadata(
            {
                METADATA_KEY: full.metadata[METADATA_KEY.encode()].decode("utf-8"),
                _ARROW_SCHEMA_KEY: base64.b64encode(full.serialize().to_pybytes()).decode(),
            }
        )
        self._writer.close()
        return self._sink.take()


def row_groups(
    batches: Iterable[RowBatch],
    rows: ParquetRows,
    copy_to: Callable[[bytes], None] | None = None,
) -> Iterator[bytes]:
    """The bytes of one row group per non-empty batch, written by `rows`.

    Batches are encoded on a thread of their own while the next ones are read (pyarrow releases
    the GIL, so reading and encoding overlap on two cores); `copy_to`, when given, gets every
    chunk on a third thread (a stored file hashed and written on the way) while the next batch
    is encoded. At most `ENCODE_AHEAD` batches wait for the encoder and `COPY_AHEAD` chunks for
    `copy_to`.
    """
    filled = (batch for batch in batches if len(batch))
    chunks = mapped_ahead(filled, rows.write, depth=ENCODE_AHEAD, name="parquet")
    if copy_to is None:
        return chunks
    return alongside(chunks, copy_to, depth=COPY_AHEAD, name="stored-file")


def parquet_chunks(
    batches: Iterable[RowBatch],
    spec: LoopSpec,
    metadata: dict[str, Any],
    copy_to: Callable[[bytes], None] | None = None,
) -> Iterator[bytes]:
    """A Parquet file, one row group per batch, handed over after each row group.

    `copy_to` is given every chunk too, on a thread of its own (see `row_groups`).
    """
    rows = ParquetRows(spec)
    yield from row_groups(batches, rows, copy_to)
    # no footer unless every batch arrived: a reader then sees a broken file, not a short one
    footer = rows.close(metadata)
    if copy_to is not None:
        copy_to(footer)
    yield footer


# What each JSON line holds before each column's value, and after the last.
_JSONL_PREFIXES = [
    (("{" if i == 0 else ",") + f'"{name}":').encode() for i, name in enumerate(COLUMNS)
]
_JSONL_END = b"}\n"
_NUMPY = orjson.OPT_SERIALIZE_NUMPY
# Lines written (and handed over) at a time. A piece of about 1.4 MB at 64 features stays in the
# processor's cache between being written and joined; a batch's 8192 rows at once (12 MB) took
# two to three times the CPU time a row.
JSONL_ROWS = 1024


def _json_numbers(values: np.ndarray) -> list[bytes]:
    """The JSON text of each number of a 1-D array: one orjson call for the batch, then split."""
    text = orjson.dumps(np.ascontiguousarray(values), option=_NUMPY)
    return text[1:-1].split(b",")


def _json_vectors(values: np.ndarray) -> list[bytes]:
    """The JSON array of each row of a 2-D float array, as float64 (the stored float32's exact
    value). A call per row: splitting one dump of the whole batch costs more."""
    rows = np.ascontiguousarray(values, dtype=np.float64)
    return [orjson.dumps(row, option=_NUMPY) for row in rows]


def _json_names(codes: np.ndarray, names: list[str | None]) -> list[bytes]:
    """The JSON text of each row's name, given as codes into `names` (None is null)."""
    table = np.array([orjson.dumps(name) for name in names], dtype=object)
    return list(table[codes])


def _refuse_non_finite(batch: RowBatch, floats: list[np.ndarray]) -> None:
    for values in floats:
        bad = ~np.isfinite(values)
        if bad.any():
            row = int(np.flatnonzero(bad.reshape(len(batch), -1).any(axis=1))[0])
            raise ValueError(
                f"step {int(batch.step_id[row])} holds a number JSON cannot write "
                "(NaN or infinity); the store holds finite numbers only"
            )


def jsonl_lines(batch: RowBatch, spec: LoopSpec) -> bytes:
    """The JSON Lines of a non-empty batch, one object per row with the export columns.

    Each column's values are turned into text for the whole batch at once and the lines are
    spliced from them by list slicing, so no Python code runs per value, and per row only the
    orjson call of its features.
    """
    if batch.features is None:
        raise ValueError("an export needs the features of every row")
    action_is_vector = not spec.is_discrete
    _refuse_non_finite(
        batch, [batch.features, batch.agreement, *([batch.action] if action_is_vector else [])]
    )
    rounds, round_code = np.unique(batch.round, return_inverse=True)
    rollouts, rollout_code = np.unique(batch.rollout_id, return_inverse=True)
    values = {
        "step_id": _json_numbers(batch.step_id),
        "features": _json_vectors(batch.features),
        "expert_action": (
            _json_vectors(batch.action) if action_is_vector else _json_numbers(batch.action)
        ),
        "round": _json_numbers(batch.round),
        "source": _json_names(batch.source, list(SOURCES)),
        "learner_version": _json_names(
            round_code, [batch.learner_versions.get(r) for r in rounds.tolist()]
        ),
        "rollout": _json_names(rollout_code, [batch.rollout_keys[i] for i in rollouts.tolist()]),
        "step": _json_numbers(batch.step_index),
        "label_count": _json_numbers(batch.label_count),
        "agreement": _json_numbers(batch.agreement),
    }
    n = len(batch)
    per_line = 2 * len(COLUMNS) + 1  # each column's key and value, then the line's end
    parts: list[bytes] = [_JSONL_END] * (per_line * n)
    for at, (name, prefix) in enumerate(zip(COLUMNS, _JSONL_PREFIXES, strict=True)):
        parts[2 * at :: per_line] = [prefix] * n
        parts[2 * at + 1 :: per_line] = values[name]
    return b"".join(parts)


def jsonl_chunks(batches: Iterable[RowBatch], spec: LoopSpec) -> Iterator[bytes]:
    """JSON Lines, one object per row with the export columns, `JSONL_ROWS` lines at a time."""
    for batch in batches:
        for start in range(0, len(batch), JSONL_ROWS):
            yield jsonl_lines(batch.take(slice(start, start + JSONL_ROWS)), spec)


class _SpooledColumn:
    """One fixed-dtype column written to a temporary file as raw .npy body bytes."""

    def __init__(self, dtype: str, width: int | None, spool_dir: Path | None) -> None:
        self.dtype = np.dtype(dtype)
        self.width = width
        self.file: IO[bytes] = tempfile.TemporaryFile(dir=spool_dir)

    def add(self, values: np.ndarray) -> None:
        self.file.write(np.ascontiguousarray(values, dtype=self.dtype).tobytes())

    def shape(self, rows: int) -> tuple[int, ...]:
        return (rows,) if self.width is None else (rows, self.width)


class _SpooledText:
    """A text column spooled as int32 codes into a table of its distinct values."""

    def __init__(self, spool_dir: Path | None) -> None:
        self.codes = _SpooledColumn("<i4", None, spool_dir)
        self.table: dict[str, int] = {}

    def add(self, codes: np.ndarray, names: list[str | None]) -> None:
        """Add rows given as codes into `names` (None is written as "")."""
        to_global = np.array(
            [self.table.setdefault(name or "", len(self.table)) for name in names], dtype=np.int32
        )
        self.codes.add(to_global[codes])

    def names(self) -> np.ndarray:
        return text_table(self.table)


def text_table(names: Iterable[str]) -> np.ndarray:
    """Distinct names as a fixed-width string array: the width of a text member's values."""
    listed = list(names)
    width = max([1, *(len(v) for v in listed)])
    return np.array(listed, dtype=f"<U{width}")


def _npy_header(dtype: np.dtype[Any], shape: tuple[int, ...]) -> bytes:
    out = io.BytesIO()
    header = {"descr": np.lib.format.dtype_to_descr(dtype), "fortran_order": False, "shape": shape}
    np.lib.format.write_array_header_1_0(out, header)
    return out.getvalue()


def npz_numbers(spec: LoopSpec) -> dict[str, tuple[str, int | None]]:
    """The .npz members that hold numbers: each one's dtype, and its width where a row holds
    a vector (None: one value a row). The text columns are fixed-width strings of their own."""
    return {
        "step_id": ("<i8", None),
        "features": ("<f4", spec.n_features),
        "expert_action": ("<i8", None) if spec.is_discrete else ("<f4", spec.action_width),
        "round": ("<i8", None),
        "step": ("<i8", None),
        "label_count": ("<i8", None),
        "agreement": ("<f8", None),
    }


@dataclass(frozen=True)
class NpzMember:
    """One .npy member of an .npz export: its dtype and shape, and arrays whose bytes, one
    after another, are its body (made only when the member is written)."""

    dtype: np.dtype[Any]
    shape: tuple[int, ...]
    parts: Callable[[], Iterator[np.ndarray | bytes]]  # bytes: already the member's bytes


def npz_chunks(
    batches: Iterable[RowBatch],
    spec: LoopSpec,
    metadata: dict[str, Any],
    spool_dir: Path | None = None,
) -> Iterator[bytes]:
    """A .npz archive of one .npy member per column, plus "manifest" (a 0-d JSON string).

    A zip holds its members one after another, so the rows' columns are spooled to temporary
    files first and copied out member by member (`npz_archive`)."""
    fixed = {
        name: _SpooledColumn(dtype, width, spool_dir)
        for name, (dtype, width) in npz_numbers(spec).items()
    }
    text = {name: _SpooledText(spool_dir) for name in ("source", "learner_version", "rollout")}
    rows = 0
    try:
        for batch in batches:
            if not len(batch):
                continue
            assert batch.features is not None
            fixed["step_id"].add(batch.step_id)
            fixed["features"].add(batch.features)
            fixed["expert_action"].add(batch.action)
            fixed["round"].add(batch.round)
            fixed["step"].add(batch.step_index)
            fixed["label_count"].add(batch.label_count)
            fixed["agreement"].add(batch.agreement)
            text["source"].add(batch.source, list(SOURCES))
            rounds, round_code = np.unique(batch.round, return_inverse=True)
            versions = [batch.learner_versions.get(r) for r in rounds.tolist()]
            text["learner_version"].add(round_code, versions)
            rollouts, rollout_code = np.unique(batch.rollout_id, return_inverse=True)
            text["rollout"].add(rollout_code, [batch.rollout_keys[i] for i in rollouts.tolist()])
            rows += len(batch)
        members = {
            **{
                name: NpzMember(column.dtype, column.shape(rows), partial(_spooled, column.file))
                for name, column in fixed.items()
            },
            **{
                name: NpzMember(
                    (names := column.names()).dtype,
                    (rows,),
                    partial(_spooled_names, column.codes.file, names),
                )
                for name, column in text.items()
            },
        }
        yield from npz_archive(members, metadata)
    finally:
        for spooled in [*fixed.values(), *(t.codes for t in text.values())]:
            spooled.file.close()


def _spooled(file: IO[bytes]) -> Iterator[bytes]:
    file.seek(0)
    while chunk := file.read(_COPY_BYTES):
        yield chunk


def _spooled_names(codes: IO[bytes], names: np.ndarray) -> Iterator[bytes]:
    rows_per_chunk = max(1, _COPY_BYTES // names.dtype.itemsize)
    codes.seek(0)
    while chunk := codes.read(4 * rows_per_chunk):
        yield names[np.frombuffer(chunk, dtype="<i4")].tobytes()


def npz_archive(members: dict[str, NpzMember], metadata: dict[str, Any]) -> Iterator[bytes]:
    """The .npz archive of `members` (one per export column, in `COLUMNS` order) and the
    manifest, in pieces of at least `_PIECE_BYTES` but the last: every piece is a chunk of the
    answer, and a column decoded a row group at a time comes in parts of a few kB."""
    sink = _Sink()
    with zipfile.ZipFile(sink, mode="w", compression=zipfile.ZIP_STORED) as archive:
        for name in COLUMNS:
            column = members[name]
            info = zipfile.ZipInfo(f"{name}.npy", date_time=_ZIP_TIME)
            header = _npy_header(column.dtype, column.shape)
            # the size is known before the body: zipfile then decides on ZIP64 up front
            info.file_size = len(header) + int(np.prod(column.shape)) * column.dtype.itemsize
            with archive.open(info, mode="w") as member:
                member.write(header)
                for part in column.parts():
                    if isinstance(part, bytes):  # written as it is: the sink keeps it uncopied
                        member.write(part)
                    else:
                        body = np.ascontiguousarray(part, dtype=column.dtype).reshape(-1)
                        member.write(body.view(np.uint8).data)
                    if sink.pending >= _PIECE_BYTES:
                        yield sink.take()
        manifest = np.array(json.dumps(metadata, sort_keys=True))
        info = zipfile.ZipInfo("manifest.npy", date_time=_ZIP_TIME)
        with archive.open(info, mode="w") as member:
            member.write(_npy_header(manifest.dtype, ()) + manifest.tobytes())
    yield sink.take()
