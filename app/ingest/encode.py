"""Vectors to and from the store's little-endian float32 bytes, a whole column at a time."""

from __future__ import annotations

import numpy as np

FLOAT32_LE = np.dtype("<f4")


def rows_to_bytes(values: np.ndarray) -> list[bytes]:
    """One bytes object per row of a 2-D or 3-D float array (each row flattened)."""
    flat = np.ascontiguousarray(values.reshape(len(values), -1), dtype=FLOAT32_LE)
    width = flat.shape[1] * FLOAT32_LE.itemsize
    # A void view turns each row into one opaque item; tolist() then yields bytes without a
    # Python-level loop over the features.
    blobs: list[bytes] = flat.view(np.dtype((np.void, width))).ravel().tolist()  # type: ignore[assignment]
    return blobs


def bytes_to_rows(blobs: list[bytes], width: int) -> np.ndarray:
    """Decode equal-length float32 blobs into an array of shape (n_rows, width)."""
    if not blobs:
        return np.empty((0, width), dtype=np.float32)
    joined = b"".join(blobs)
    return np.frombuffer(joined, dtype=FLOAT32_LE).reshape(len(blobs), width).astype(np.float32)
