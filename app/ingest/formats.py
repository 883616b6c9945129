"""Read a rollout file of any accepted format into one Arrow table with the contract's columns.

Parquet is read by pyarrow; .npz by numpy, each member's header checked before its array is
decompressed (never unpickling); JSON Lines line by line so that errors can name the line. Everything after this module works on the Arrow table only.
"""

from __future__ import annotations

import base64
import codecs
import json
import math
import zipfile
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import numpy.lib.format as npformat
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..errors import InvalidInput, TooLarge
from ..limits import shown
from ..shared.contract import FORMATS
from .logs.archive import BAG_FORMATS, bag_format

DEFAULT_MAX_ARRAY_BYTES = 1024 * 1024 * 1024
NPZ_MAX_MEMBERS = 5000  # the contract's columns plus one per feature (at most 4096)
NPY_MAX_HEADER_BYTES = 10_000  # numpy's own default bound on a .npy header
# dtype kinds an .npz member may have: booleans, integers, floats, fixed-width text and bytes
NPZ_KINDS = frozenset("biufUS")
JSON_KIND_DEPTH = 4


def detect_format(path: Path, filename: str) -> str:
    """The file's format from its name, or from its first bytes when the name does not say."""
    log_format = bag_format(path, filename)
    if log_format is not None:
        return log_format
    lower = filename.lower()
    if lower.endswith(".parquet") or lower.endswith(".pq"):
        return "parquet"
    if lower.endswith(".npz"):
        return "npz"
    if lower.endswith(".jsonl") or lower.endswith(".ndjson"):
        return "jsonl"
    with path.open("rb") as fh:
        head = fh.read(4)
    if head == b"PAR1":
        return "parquet"
    if head[:2] == b"PK":
        return "npz"
    if head[:1] == b"{":
        return "jsonl"
    raise InvalidInput(
        f"cannot tell the format of '{shown(filename)}'; use one of {list(FORMATS)} "
        f"or a robot log ({', '.join(BAG_FORMATS)})"
    )


def read_table(
    path: Path, file_format: str, *, max_array_bytes: int = DEFAULT_MAX_ARRAY_BYTES
) -> pa.Table:
    """Read a rollout file into an Arrow table; an unreadable file raises InvalidInput.

    `max_array_bytes` bounds what the file's arrays may expand to in memory (413 beyond); it is
    checked from the file's own declarations before anything is decompressed.
    """
    if path.stat().st_size == 0:
        raise InvalidInput("the file is empty")
    if file_format == "parquet":
        table = _read_parquet(path, max_array_bytes)
    elif file_format == "npz":
        table = _read_npz(path, max_array_bytes)
    elif file_format == "jsonl":
        table = _read_jsonl(path)
    else:
        raise InvalidInput(f"unknown format '{shown(file_format)}'; use one of {list(FORMATS)}")
    if table.num_rows == 0:
        raise InvalidInput("the file holds no rows")
    return table


def _too_large(what: str, declared: int, limit: int) -> TooLarge:
    return TooLarge(
        f"{what} would expand to {declared} bytes in memory; at most {limit} are accepted"
    )


def _read_parquet(path: Path, max_array_bytes: int) -> pa.Table:
    # Messages never repeat pyarrow's: they hold the spool file's path and schema dumps. The
    # file is read as one file (not as a dataset, which refuses repeated column names with a
    # schema dump), and validation names a repeated column.
    try:
        parquet = pq.ParquetFile(path, memory_map=True)
        metadata = parquet.metadata
        text = dictionary_text_columns(parquet, max_array_bytes)
        parquet = pq.ParquetFile(path, memory_map=True, read_dictionary=text)
        groups, read_bytes = [], 0
        for i in range(metadata.num_row_groups):
            group = parquet.read_row_group(i)
            read_bytes += _decoded_bytes(group)
            if read_bytes > max_array_bytes:
                raise _too_large("the Parquet file", read_bytes, max_array_bytes)
            groups.append(_decode_dictionaries(group))
        return pa.concat_tables(groups) if groups else parquet.schema_arrow.empty_table()
    except (pa.ArrowException, OSError) as exc:
        raise InvalidInput("not a readable Parquet file (truncated or damaged?)") from exc


def dictionary_text_columns(parquet: pq.ParquetFile, max_array_bytes: int) -> list[str]:
    """Refuse a file whose declared decoded size is over `max_array_bytes` (413), and name the
    text columns to read as dictionaries.

    Dictionary-encoded text declares only its dictionary and indices: one long value repeated a
    million times is small on disk and huge once decoded. Text columns that may repeat values
    so are therefore read as dictionaries, their decoded size counted, and only then decoded.
    Text stored literally (camera images, written without a dictionary) is read as it is: it
    declares its decoded size, checked here, and the dictionary reader would hash and copy every
    value (most of an image upload's time).
    """
    metadata = parquet.metadata
    declared = _declared_parquet_bytes(metadata)
    if declared > max_array_bytes:
        raise _too_large("the Parquet file", declared, max_array_bytes)
    literal = _literal_columns(metadata)
    return [f.name for f in parquet.schema_arrow if _is_text(f.type) and f.name not in literal]


# Encodings that store every byte of every value in the file (RLE and BIT_PACKED only for the
# levels that mark missing values): a column chunk declaring no others, and no dictionary page,
# decodes to about its declared uncompressed size. DELTA_BYTE_ARRAY is not among them: a value
# may repeat its predecessor's bytes.
LITERAL_ENCODINGS = frozenset({"PLAIN", "RLE", "BIT_PACKED", "DELTA_LENGTH_BYTE_ARRAY"})


def _literal_columns(metadata: pq.FileMetaData) -> set[str]:
    """Columns every chunk of which declares a literal encoding (LITERAL_ENCODINGS)."""
    seen: set[str] = set()
    repeating: set[str] = set()
    for i in range(metadata.num_row_groups):
        group = metadata.row_group(i)
        for j in range(group.num_columns):
            chunk = group.column(j)
            seen.add(chunk.path_in_schema)
            if chunk.has_dictionary_page or not set(chunk.encodings) <= LITERAL_ENCODINGS:
                repeating.add(chunk.path_in_schema)
    return seen - repeating


def _is_text(kind: pa.DataType) -> bool:
    return bool(
        pa.types.is_string(kind)
        or pa.types.is_large_string(kind)
        or pa.types.is_binary(kind)
        or pa.types.is_large_binary(kind)
    )


def _decoded_bytes(group: pa.Table) -> int:
    """Bytes the row group takes once its dictionary columns are decoded (others as they are)."""
    total = 0
    for column in group.columns:
        if not pa.types.is_dictionary(column.type):
            total += column.nbytes
            continue
        for chunk in column.chunks:
            lengths = pc.binary_length(chunk.dictionary).to_numpy(zero_copy_only=False)
            indices = chunk.indices.fill_null(0).to_numpy(zero_copy_only=False)
            # each value's bytes plus its 4-byte offset, as the decoded array holds them
            total += (
                int(lengths[indices].sum()) + 4 * len(chunk) if len(lengths) else 4 * len(chunk)
            )
    return total


def _decode_dictionaries(group: pa.Table) -> pa.Table:
    columns = [
        pa.chunked_array([_decoded(c) for c in column.chunks], column.type.value_type)
        if pa.types.is_dictionary(column.type)
        else column
        for column in group.columns
    ]
    return pa.Table.from_arrays(columns, names=group.column_names)


def _decoded(chunk: pa.DictionaryArray) -> pa.Array:
    """A dictionary array as plain values. Values that are all distinct and in order (camera
    images, read through the dictionary reader) are the dictionary itself: no copy is made."""
    dictionary = chunk.dictionary
    if chunk.null_count == 0 and len(dictionary) == len(chunk):
        indices = chunk.indices.to_numpy(zero_copy_only=False)
        if np.array_equal(indices, np.arange(len(indices))):
            return dictionary
    return pc.cast(chunk, dictionary.type)


# Bytes per value once decoded, by Parquet physical type; text counts its 4-byte offset at least.
PARQUET_VALUE_BYTES = {"BOOLEAN": 1, "INT32": 4, "FLOAT": 4, "INT64": 8, "DOUBLE": 8, "INT96": 12}


def _declared_parquet_bytes(metadata: pq.FileMetaData) -> int:
    """What the file's columns declare they hold once decoded (encodings such as run lengths
    make the stored size far smaller): the larger of the uncompressed size and values x width."""
    total = 0
    for i in range(metadata.num_row_groups):
        group = metadata.row_group(i)
        for j in range(group.num_columns):
            chunk = group.column(j)
            width = PARQUET_VALUE_BYTES.get(chunk.physical_type, 4)
            total += max(chunk.total_uncompressed_size, chunk.num_values * width)
    return total


@dataclass(frozen=True)
class NpyHeader:
    """What a .npy member declares about its array, read before it is decompressed."""

    name: str
    shape: tuple[int, ...]
    dtype: np.dtype[Any]

    @property
    def n_bytes(self) -> int:
        return math.prod(self.shape) * self.dtype.itemsize


def npz_headers(archive: zipfile.ZipFile) -> list[NpyHeader]:
    """Each member's shape and dtype from its .npy header, refusing object, complex and
    structured dtypes and more than three dimensions; no array data is read."""
    members = archive.infolist()
    if len(members) > NPZ_MAX_MEMBERS:
        raise InvalidInput(f"the .npz file has {len(members)} members; at most {NPZ_MAX_MEMBERS}")
    headers = []
    for info in members:
        name = info.filename.removesuffix(".npy")
        if not info.filename.endswith(".npy"):
            raise InvalidInput(f".npz member '{shown(info.filename)}' is not a .npy array")
        with archive.open(info) as stream:
            version = npformat.read_magic(stream)
            if version == (1, 0):
                shape, _, dtype = npformat.read_array_header_1_0(stream, NPY_MAX_HEADER_BYTES)
            elif version == (2, 0):
                shape, _, dtype = npformat.read_array_header_2_0(stream, NPY_MAX_HEADER_BYTES)
            else:
                raise InvalidInput(
                    f".npz array '{shown(name)}': .npy version {version} is not read"
                )
        if dtype.kind not in NPZ_KINDS or dtype.names is not None or dtype.subdtype is not None:
            raise InvalidInput(
                f".npz array '{shown(name)}' has dtype {shown(str(dtype))}; accepted: booleans, "
                "integers, floats and fixed-width text or bytes (no objects, complex numbers "
                "or records)"
            )
        if not 1 <= len(shape) <= 3 or any(d < 0 for d in shape):
            raise InvalidInput(
                f".npz array '{shown(name)}' has shape {shape}; one to three dimensions accepted"
            )
        headers.append(NpyHeader(name, tuple(shape), dtype))
    return headers


def checked_npz_headers(archive: zipfile.ZipFile, max_array_bytes: int) -> list[NpyHeader]:
    """The archive's .npy headers, refused unless there is at least one array, every array has
    one row per step (the same length), and their declared sizes fit `max_array_bytes` (413):
    all from the headers, before anything is decompressed."""
    headers = npz_headers(archive)
    if not headers:
        raise InvalidInput("the .npz file holds no arrays")
    lengths = {h.name: h.shape[0] for h in headers}
    if len(set(lengths.values())) != 1:
        shown_lengths = shown(", ".join(f"{k}: {v}" for k, v in lengths.items()), 200)
        raise InvalidInput(f".npz arrays must all have one row per step; lengths: {shown_lengths}")
    declared = sum(h.n_bytes for h in headers)
    if declared > max_array_bytes:
        raise _too_large("the .npz file's arrays", declared, max_array_bytes)
    return headers


def _read_npz(path: Path, max_array_bytes: int) -> pa.Table:
    try:
        with zipfile.ZipFile(path) as archive:
            headers = checked_npz_headers(archive, max_array_bytes)
            arrays = {}
            for header in headers:
                with archive.open(header.name + ".npy") as stream:
                    arrays[header.name] = npformat.read_array(
                        stream, allow_pickle=False, max_header_size=NPY_MAX_HEADER_BYTES
                    )
    except (ValueError, OSError, zipfile.BadZipFile, EOFError, zlib.error) as exc:
        # numpy's messages name internals (and advise unpickling): say what is wrong instead
        raise InvalidInput(
            "not a readable .npz file (truncated, damaged or not a zip of .npy)"
        ) from exc
    columns = {}
    for name, array in arrays.items():
        columns[name] = _npz_column(name, array)
    return pa.table(columns)


def _npz_column(name: str, array: np.ndarray) -> pa.Array:
    if array.ndim == 1:
        if array.dtype.kind == "U":
            return pa.array(array.astype(object))
        if array.dtype.kind == "S":
            return pa.array(array.tolist(), type=pa.binary())
        if name in ("learner_action", "expert_action") and array.dtype.kind == "i":
            # -1 marks "no action on this step" in an integer column
            return pa.array(array, mask=array < 0)
        return pa.array(array)
    if array.ndim == 2:
        flat = pa.array(np.ascontiguousarray(array).reshape(-1))
        if name in ("learner_action", "expert_action") and array.dtype.kind == "f":
            # a row of NaN marks "no action on this step" in a float matrix
            missing = np.isnan(array).all(axis=1)
            return pa.FixedSizeListArray.from_arrays(flat, array.shape[1], mask=pa.array(missing))
        return pa.FixedSizeListArray.from_arrays(flat, array.shape[1])
    if array.ndim == 3:
        n, m, w = array.shape
        inner = pa.FixedSizeListArray.from_arrays(
            pa.array(np.ascontiguousarray(array).reshape(-1)), w
        )
        return pa.FixedSizeListArray.from_arrays(inner, m)
    raise InvalidInput(
        f".npz array '{shown(name)}' has {array.ndim} dimensions; at most 3 are accepted"
    )


def jsonl_lines(path: Path) -> Iterator[tuple[int, dict[str, Any], int]]:
    """Each non-blank line of a JSON Lines file as (line number, row, bytes of the line);
    UTF-16 text and every bad line are refused naming the line."""
    with path.open("rb") as fh:
        if fh.read(2) in (codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE):
            raise InvalidInput("line 1: the file is UTF-16 text; save it as UTF-8")
        fh.seek(0)
        for line_number, raw in enumerate(fh, start=1):
            row = _jsonl_row(raw, line_number)
            if row is not None:
                yield line_number, row, len(raw)


def _read_jsonl(path: Path) -> pa.Table:
    rows: list[dict[str, Any]] = []
    line_of_row: list[int] = []
    for line_number, row, _ in jsonl_lines(path):
        rows.append(row)
        line_of_row.append(line_number)
    if not rows:
        raise InvalidInput("the file holds no rows")
    # Every column any line names, in order of first appearance: Table.from_pylist would take
    # the first line's keys only and drop a column that line leaves out.
    names = list(dict.fromkeys(name for row in rows for name in row))
    try:
        return pa.Table.from_pydict({name: [row.get(name) for row in rows] for name in names})
    except (pa.ArrowException, TypeError, OverflowError) as exc:
        raise InvalidInput(_mixed_types(rows, line_of_row)) from exc


def _jsonl_row(raw: bytes, line_number: int) -> dict[str, Any] | None:
    """One line as a row, or None for a blank line; every refusal names the line."""
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InvalidInput(
            f"line {line_number}: not UTF-8 text (byte {exc.start + 1} of the line)"
        ) from exc
    if line_number == 1:
        text = text.removeprefix("\ufeff")  # a UTF-8 byte order mark, as some editors write
    if not text.strip():
        return None
    try:
        row = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidInput(f"line {line_number}: not valid JSON ({exc.msg})") from exc
    except RecursionError as exc:
        raise InvalidInput(f"line {line_number}: JSON nested too deeply") from exc
    except ValueError as exc:  # Python refuses integers of more than 4300 digits
        raise InvalidInput(f"line {line_number}: a number has too many digits") from exc
    if not isinstance(row, dict):
        raise InvalidInput(f"line {line_number}: each line must be a JSON object")
    if "scene" in row and row["scene"] is not None and not isinstance(row["scene"], str):
        try:
            row["scene"] = json.dumps(row["scene"], separators=(",", ":"), sort_keys=True)
        except (RecursionError, ValueError) as exc:
            raise InvalidInput(f"line {line_number}, column scene: nested too deeply") from exc
    if isinstance(row.get("image"), str):
        try:
            row["image"] = base64.b64decode(row["image"], validate=True)
        except ValueError as exc:
            raise InvalidInput(f"line {line_number}, column image: not base64") from exc
    return row


def _kind(value: Any, depth: int = 0) -> str:
    """A value's JSON kind, with the kinds inside lists ("list of number")."""
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, int):
        return "number" if -(2**63) <= value < 2**63 else "integer beyond 64 bits"
    if isinstance(value, float):
        return "number"
    if isinstance(value, str):
        return "text"
    if isinstance(value, dict):
        return "object"
    if isinstance(value, list) and depth < JSON_KIND_DEPTH:
        inner = sorted({_kind(v, depth + 1) for v in value if v is not None})
        return "list" if not inner else "list of " + " and ".join(inner)
    return "list"


def _mixed_types(
    rows: list[dict[str, Any]],
    line_of_row: list[int],
    first: dict[str, tuple[str, int]] | None = None,
) -> str:
    """Name the first line whose value does not fit its column (Arrow's message names none).
    `first`: each column's kind of value and line as earlier lines set them (a file read in
    groups of lines)."""
    first = {} if first is None else first
    for row, line in zip(rows, line_of_row, strict=True):
        for name, value in row.items():
            if value is None:
                continue
            kind = _kind(value)
            where = f"line {line}, column {shown(name)}"
            if "beyond 64 bits" in kind:
                return f"{where}: an integer beyond the 64-bit range"
            seen = first.setdefault(name, (kind, line))
            if kind != seen[0] and not (kind == "list" or seen[0] == "list"):
                return f"{where}: {kind} where line {seen[1]} has {seen[0]}"
    return "the lines do not form one table: a column mixes kinds of values across lines"
