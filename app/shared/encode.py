"""Vectors to and from the store's little-endian float32 bytes, a whole column at a time."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import DTypeLike

FLOAT32_LE = np.dtype("<f4")
# float32's largest finite value (docs/references.md, "Hostile input"): features, actions and
# learner outputs are stored as float32, so a finite number beyond it would become infinity
FLOAT32_MAX = float(np.finfo(np.float32).max)


def rows_to_bytes(values: np.ndarray) -> list[bytes]:
    """One bytes object per row of a 2-D or 3-D float array (each row flattened)."""
    flat = np.ascontiguousarray(values.reshape(len(values), -1), dtype=FLOAT32_LE)
    width = flat.shape[1] * FLOAT32_LE.itemsize
    # A void view turns each row into one opaque item; tolist() then yields bytes without a
    # Python-level loop over the features.
    blobs: list[bytes] = flat.view(np.dtype((np.void, width))).ravel().tolist()  # type: ignore[assignment]
    return blobs


def nullable_rows(
    blobs: Sequence[bytes | None], shape: tuple[int, ...], *, fill: float, dtype: DTypeLike
) -> tuple[np.ndarray, np.ndarray]:
    """Decode float32 blobs, None where a row has no value, into an array (n, *shape).

    Rows without a value hold `fill`. Returns the array and the mask of rows that had one.
    """
    present = np.array([b is not None for b in blobs], dtype=bool)
    out = np.full((len(blobs), *shape), fill, dtype=dtype)
    if present.any():
        joined = b"".join(b for b in blobs if b is not None)
        out[present] = np.frombuffer(joined, dtype=FLOAT32_LE).reshape(-1, *shape)
    return out, present


def stored_actions(
    indexes: Sequence[int | None], vectors: Sequence[bytes | None], *, discrete: bool, width: int
) -> np.ndarray:
    """Actions as stored (an index, or float32 bytes of `width` values; None where absent) as
    one array: int64 with -1 where absent, or float64 (n, width) with NaN where absent."""
    if discrete:
        return np.array([-1 if v is None else v for v in indexes], dtype=np.int64).reshape(-1)
    rows, _ = nullable_rows(vectors, (width,), fill=np.nan, dtype=np.float64)
    return rows
