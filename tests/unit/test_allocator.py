"""The server's allocator choices (app/shared/allocator.py).

Arrow's default pool must be the C library's allocator once an app is built: the decoded buffers
of an export are freed on other threads than they were made on, and the default mimalloc pool
keeps such pages (bench/export.py measures the peaks). Returning free pages must leave every
live buffer intact.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from expertloop.main import create_app
from expertloop.shared.allocator import release_free_memory


def test_an_app_makes_the_system_allocator_arrows_default(settings):
    pa.set_memory_pool(pa.mimalloc_memory_pool())  # as pyarrow starts where mimalloc is built in
    try:
        create_app(settings)
        assert pa.default_memory_pool().backend_name == "system"
        kept = pa.allocate_buffer(8_000_000)  # from the default pool
        assert pa.system_memory_pool().bytes_allocated() >= kept.size
    finally:
        pa.set_memory_pool(pa.system_memory_pool())


def test_returning_free_pages_keeps_live_buffers():
    live = pc.add(pa.array(np.arange(500_000, dtype=np.int64)), 1)  # pool-allocated
    freed = [np.random.default_rng(0).random(1 << 20) for _ in range(8)]
    del freed
    release_free_memory()
    assert live.slice(499_997).to_pylist() == [499_998, 499_999, 500_000]
