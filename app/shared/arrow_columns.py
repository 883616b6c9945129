"""Arrow arrays as numpy arrays, read from their buffers.

Not Array.to_numpy: pyarrow imports pandas on the way, some 45 MB of a server. Every function
refuses missing values where the export columns have none, and says which type it found when it
is not the one expected.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from .encode import FLOAT32_LE


def _no_nulls(array: pa.Array, what: str) -> None:
    if array.null_count:
        raise ValueError(f"{what} has {array.null_count} missing values")


def numbers(
    array: pa.Array,
    dtype: type[np.generic] | np.dtype[np.generic],
    *,
    name: str = "a column",
    integers: bool = False,
) -> np.ndarray:
    """An integer (or, unless `integers`, floating-point) array as `dtype`; a view when the
    types agree. `name` says which column in errors."""
    _no_nulls(array, name)
    if pa.types.is_integer(array.type):
        kind = "i" if pa.types.is_signed_integer(array.type) else "u"
    elif pa.types.is_floating(array.type) and not integers:
        kind = "f"
    else:
        wanted = "integers" if integers else "numbers"
        raise ValueError(f"{name} holds {array.type}, not {wanted}")
    found = np.dtype(f"{kind}{array.type.bit_width // 8}")  # Arrow buffers: native order
    values = np.frombuffer(array.buffers()[1], dtype=found)
    return values[array.offset : array.offset + len(array)].astype(dtype, copy=False)


def fixed_width_floats(array: pa.Array, width: int) -> np.ndarray:
    """A fixed-size list of float32 values as a (rows, width) array, a view of its buffer."""
    if not (
        pa.types.is_fixed_size_list(array.type)
        and array.type.list_size == width
        and pa.types.is_float32(array.type.value_type)
    ):
        raise ValueError(f"a column holds {array.type}, not lists of {width} float32 values")
    _no_nulls(array, "a vector column")
    flat = array.flatten()  # the parent's offset applied
    _no_nulls(flat, "a vector column's values")
    values = np.frombuffer(flat.buffers()[1], dtype=FLOAT32_LE)
    return values[flat.offset : flat.offset + len(flat)].reshape(len(array), width)


def dictionary_codes(
    array: pa.Array, *, name: str = "a column", missing: bool = False
) -> tuple[np.ndarray, list[str | None]]:
    """A dictionary-encoded string array as int32 codes into its values; with `missing`, -1
    where a row has no value (else such a row is refused, as in `numbers`)."""
    if not pa.types.is_dictionary(array.type):
        raise ValueError(f"{name} holds {array.type}, not dictionary-encoded text")
    indices = array.indices
    if missing and indices.null_count:
        indices = indices.fill_null(-1)
    return numbers(indices, np.int32, name=name, integers=True), array.dictionary.to_pylist()
