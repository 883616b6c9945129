"""How a server allocates memory for bulk work, and hands it back when the work ends.

An export, a new version or an upload allocates tens of MB of short-lived buffers: Arrow's
through its pool, numpy's and Python's through the C library's malloc, on whichever of the
server's threads the work ran. Two choices keep a server near its idle size between such jobs:

- Arrow allocates through the C library too (`use_system_allocator`). Its default pool, mimalloc,
  keeps each thread's freed pages for that thread, and an export decoded from a stored file
  makes its buffers on one thread and frees them on others: an incremental pull of 1M rows
  peaked at 325–335 MB with it and 248–258 MB with the C library's allocator (README, Export).
- When a job ends, free pages go back to the system (`release_free_memory`): the C library's
  malloc_trim returns every arena's free pages, so the next job maps fresh ones instead of a
  server holding on to the largest job it ever ran, one arena per thread.
"""

from __future__ import annotations

import ctypes
import ctypes.util
from collections.abc import Callable

import pyarrow as pa


def _glibc_malloc_trim() -> Callable[[int], int] | None:
    name = ctypes.util.find_library("c")
    if name is None:
        return None
    try:
        trim = ctypes.CDLL(name).malloc_trim  # glibc only; musl and others have none
    except (OSError, AttributeError):
        return None
    trim.argtypes = [ctypes.c_size_t]
    trim.restype = ctypes.c_int
    return trim  # type: ignore[no-any-return]


_MALLOC_TRIM = _glibc_malloc_trim()


def use_system_allocator() -> None:
    """Make the C library's allocator Arrow's default pool, for the whole process."""
    pa.set_memory_pool(pa.system_memory_pool())


def release_free_memory() -> None:
    """Return free pages of Arrow's default pool and of every malloc arena to the system."""
    pa.default_memory_pool().release_unused()
    if _MALLOC_TRIM is not None:
        _MALLOC_TRIM(0)
