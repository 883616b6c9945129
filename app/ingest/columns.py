"""Turn Arrow columns into numpy arrays, refusing wrong types, widths, nulls and non-finite values.

Errors name the 1-based row of the file and the column, so a fleet engineer can fix the file.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import InvalidInput
from ..limits import INT64_MAX, shown
from ..shared.encode import FLOAT32_MAX

# float32 has a 24-bit significand: integers up to 2**24 in magnitude are exact, some beyond are
# not (docs/references.md, "Hostile input"); larger integers are refused, not rounded silently.
FLOAT32_EXACT_INTEGER = 2**24


@dataclass
class Vectors:
    """Per-row vectors where some rows may carry none.

    values : ndarray of shape (n_rows, *shape), float32, zeros where absent
    present : ndarray of shape (n_rows,), bool
    """

    values: np.ndarray
    present: np.ndarray


def _first(mask: np.ndarray | np.bool_) -> int:
    return int(np.flatnonzero(mask)[0])


class CellError(InvalidInput):
    """A refusal of one value: keeps the row and column so a reader of a file without rows
    (a robot log) can name its own place instead (topic, field and time)."""

    def __init__(self, row: int, column: str, reason: str) -> None:
        super().__init__(f"row {row + 1}, column {column}: {reason}")
        self.row = row
        self.column = column
        self.reason = reason


def fail(row: int, column: str, message: str) -> CellError:
    """An InvalidInput naming a 0-based row index as the file's 1-based row."""
    return CellError(row, column, message)


def null_mask(column: pa.ChunkedArray) -> np.ndarray:
    """Rows where the column is null, as a bool array."""
    return np.asarray(column.is_null().to_numpy(zero_copy_only=False), dtype=bool)


def integers(column: pa.ChunkedArray, name: str) -> np.ndarray:
    """A non-null integer column as int64 (an unsigned value beyond int64 is refused, not
    wrapped around)."""
    if not pa.types.is_integer(column.type):
        raise InvalidInput(f"column {name}: expected integers, got {shown(str(column.type))}")
    nulls = null_mask(column)
    if nulls.any():
        raise fail(_first(nulls), name, "value is missing")
    values = column.to_numpy()
    if values.dtype == np.uint64 and (values > INT64_MAX).any():
        i = _first(values > INT64_MAX)
        raise fail(i, name, f"{values[i]} is beyond the 64-bit integer range")
    return np.asarray(values, dtype=np.int64)


def check_exact_in_float32(values: np.ndarray, rows: np.ndarray, name: str) -> None:
    """Refuse integer values that float32 cannot hold exactly; `rows` maps them to file rows."""
    inexact = (values > FLOAT32_EXACT_INTEGER) | (values < -FLOAT32_EXACT_INTEGER)
    if inexact.any():
        i = _first(inexact)
        raise fail(
            int(rows[i]),
            name,
            f"the integer {int(values[i])} cannot be stored exactly as float32 "
            f"(integers up to {FLOAT32_EXACT_INTEGER} in magnitude can); send it as a float",
        )


def floats(column: pa.ChunkedArray, name: str) -> np.ndarray:
    """A non-null, finite numeric column as float64."""
    if not (pa.types.is_floating(column.type) or pa.types.is_integer(column.type)):
        raise InvalidInput(f"column {name}: expected numbers, got {shown(str(column.type))}")
    nulls = null_mask(column)
    if nulls.any():
        raise fail(_first(nulls), name, "value is missing")
    values = np.asarray(column.to_numpy(), dtype=np.float64)
    bad = ~np.isfinite(values)
    if bad.any():
        raise fail(_first(bad), name, f"value {values[_first(bad)]} is not finite")
    return values


def strings(column: pa.ChunkedArray, name: str, *, allow_null: bool) -> np.ndarray:
    """A string column as an object array (None where null and allowed)."""
    if not (pa.types.is_string(column.type) or pa.types.is_large_string(column.type)):
        if pa.types.is_null(column.type) and allow_null:
            return np.full(len(column), None, dtype=object)
        raise InvalidInput(f"column {name}: expected text, got {shown(str(column.type))}")
    nulls = null_mask(column)
    if nulls.any() and not allow_null:
        raise fail(_first(nulls), name, "value is missing")
    return np.asarray(column.to_numpy(zero_copy_only=False), dtype=object)


def _is_list(type_: pa.DataType) -> bool:
    return (
        pa.types.is_list(type_)
        or pa.types.is_large_list(type_)
        or pa.types.is_fixed_size_list(type_)
    )


def as_float32(values: np.ndarray) -> np.ndarray:
    """Numbers as float32 for storage; values beyond float32's range become infinite, which the
    callers refuse, naming the value with `float32_range_reason`."""
    with np.errstate(over="ignore"):
        return values.astype(np.float32, copy=False)


def float32_range_reason(value: float) -> str:
    return (
        f"{value:g} is beyond float32's range (±{FLOAT32_MAX:.7g}), in which it is stored; "
        "scale it into that range"
    )


def floats32(column: pa.ChunkedArray, name: str) -> np.ndarray:
    """A non-null, finite numeric column as float32, refusing values float32 cannot hold."""
    values = floats(column, name)
    if pa.types.is_integer(column.type):
        check_exact_in_float32(values, np.arange(len(values)), name)
    stored = as_float32(values)
    over = np.isinf(stored)  # `values` are finite: these were beyond float32's range
    if over.any():
        i = _first(over)
        raise fail(i, name, float32_range_reason(float(values[i])))
    return stored


def float_vectors(
    column: pa.ChunkedArray,
    name: str,
    width: int,
    *,
    allow_null: bool,
    file_rows: np.ndarray | None = None,
) -> Vectors:
    """A list-of-numbers column of fixed width as float32 vectors.

    file_rows maps this column's rows to the file's rows where they differ (nested lists).
    """
    rows = file_rows if file_rows is not None else np.arange(len(column))
    if pa.types.is_null(column.type) and allow_null:
        return Vectors(np.zeros((len(column), width), np.float32), np.zeros(len(column), bool))
    if not _is_list(column.type) or not (
        pa.types.is_floating(column.type.value_type) or pa.types.is_integer(column.type.value_type)
    ):
        raise InvalidInput(
            f"column {name}: expected a list of numbers, got {shown(str(column.type))}"
        )
    combined = column.combine_chunks() if column.num_chunks != 1 else column.chunk(0)
    nulls = np.asarray(combined.is_null().to_numpy(zero_copy_only=False), dtype=bool)
    if nulls.any() and not allow_null:
        raise fail(int(rows[_first(nulls)]), name, "value is missing")
    if pa.types.is_fixed_size_list(combined.type):
        if combined.type.list_size != width:
            raise fail(
                int(rows[0]), name, f"expected {width} values, got {combined.type.list_size}"
            )
    else:
        lengths = pc.fill_null(pc.list_value_length(combined), width).to_numpy(zero_copy_only=False)
        wrong = lengths != width
        if wrong.any():
            i = _first(wrong)
            raise fail(int(rows[i]), name, f"expected {width} values, got {lengths[i]}")
    present = ~nulls
    if not present.any():
        return Vectors(np.zeros((len(combined), width), np.float32), present)
    taken = combined.filter(pa.array(present)) if nulls.any() else combined
    flat = pc.list_flatten(taken)
    if flat.null_count:
        row = np.flatnonzero(present)[_first(null_mask(pa.chunked_array([flat]))) // width]
        raise fail(int(rows[row]), name, "a value inside the list is missing")
    raw = flat.to_numpy(zero_copy_only=False)
    if raw.dtype.kind in "iu":
        row_of_value = np.repeat(rows[present], width)
        check_exact_in_float32(raw, row_of_value, name)
    # Cast to float32 before the finiteness check: a float64 beyond float32's range becomes
    # infinite in storage, so it must be refused too (and named as such: it was finite).
    dense = as_float32(raw).reshape(-1, width)
    bad_rows = ~np.isfinite(dense).all(axis=1)
    if bad_rows.any():
        i = _first(bad_rows)
        row = int(rows[int(np.flatnonzero(present)[i])])
        sent = raw.reshape(-1, width)[i]
        if np.isfinite(sent).all():
            raise fail(row, name, float32_range_reason(float(sent[_first(np.isinf(dense[i]))])))
        raise fail(row, name, "values must be finite (found NaN or infinity)")
    if not nulls.any():
        return Vectors(dense, present)
    values = np.zeros((len(combined), width), dtype=np.float32)
    values[present] = dense
    return Vectors(values, present)


def members_differ(found: int, expected: int) -> str:
    """Why an ensemble row is refused: its member count differs from the earlier rows'."""
    return (
        f"{found} members where earlier rows have {expected}; every row must have the same "
        "number of members"
    )


def float_matrices(column: pa.ChunkedArray, name: str, width: int) -> tuple[Vectors, int]:
    """A list-of-lists column (members x width) as float32 arrays; all rows share the member count.

    A column of nulls only (JSON Lines whose lines all leave it empty) has no ensemble."""
    if pa.types.is_null(column.type):
        return Vectors(
            np.zeros((len(column), 1, width), np.float32), np.zeros(len(column), bool)
        ), 0
    if not _is_list(column.type) or not _is_list(column.type.value_type):
        raise InvalidInput(
            f"column {name}: expected a list of lists of numbers, got {shown(str(column.type))}"
        )
    combined = column.combine_chunks() if column.num_chunks != 1 else column.chunk(0)
    nulls = np.asarray(combined.is_null().to_numpy(zero_copy_only=False), dtype=bool)
    present = ~nulls
    if not present.any():
        return Vectors(np.zeros((len(combined), 1, width), np.float32), present), 0
    members = pc.list_value_length(combined).to_numpy(zero_copy_only=False)
    rows = np.flatnonzero(present)
    n_members = int(members[rows[0]])
    other = members[rows] != n_members
    if other.any():
        i = int(rows[_first(other)])
        raise fail(i, name, members_differ(int(members[i]), n_members))
    if n_members < 2:
        raise InvalidInput(f"column {name}: an ensemble needs at least 2 members")
    inner = pc.list_flatten(combined.filter(pa.array(present)))
    member_rows = np.repeat(np.flatnonzero(present), n_members)
    member_vectors = float_vectors(
        pa.chunked_array([inner]), name, width, allow_null=False, file_rows=member_rows
    )
    values = np.zeros((len(combined), n_members, width), dtype=np.float32)
    values[present] = member_vectors.values.reshape(-1, n_members, width)
    return Vectors(values, present), n_members
