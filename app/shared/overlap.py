"""Work on a stream of items handed to a thread of its own, so that it overlaps the caller's.

A rebuilt export reads pages from the store, re-checks their content hash, encodes them and
hashes and writes the stored file. Each of these spends most of its time in C code that releases
the GIL (the database driver, hashlib on buffers over 2 KB, pyarrow's writer), so on a machine
with two cores they run side by side when each has a thread. Every helper here keeps at most
`depth` items in the hands of its thread: memory stays bounded by a few items, whatever the
length of the stream. Work runs in item order on one thread, so it may keep state (a running
hash, a file being written).
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from typing import TypeVar

T = TypeVar("T")
R = TypeVar("R")


def alongside(
    items: Iterable[T], work: Callable[[T], object], *, depth: int, name: str
) -> Iterator[T]:
    """Each item at once, while `work(item)` runs on a thread of its own, in item order.

    At most `depth` items wait for their work; the stream ends only once all work is done, and
    an error of the work is raised in the caller's thread (at the latest when the last item has
    been taken). Items must not be changed by the caller while their work may still run.
    """
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix=name) as worker:
        pending: deque[Future[object]] = deque()
        try:
            for item in items:
                pending.append(worker.submit(work, item))
                while len(pending) > depth:
                    pending.popleft().result()
                yield item
            while pending:
                pending.popleft().result()
        finally:
            for left in pending:  # stopped early or failed: the rest is not needed
                left.cancel()


def mapped_ahead(
    items: Iterable[T], work: Callable[[T], R], *, depth: int, name: str
) -> Iterator[R]:
    """`work(item)` of every item, in order, computed on a thread of its own up to `depth`
    items ahead of the caller, who meanwhile takes the next items."""
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix=name) as worker:
        pending: deque[Future[R]] = deque()
        try:
            for item in items:
                pending.append(worker.submit(work, item))
                if len(pending) > depth:
                    yield pending.popleft().result()
            while pending:
                yield pending.popleft().result()
        finally:
            for left in pending:
                left.cancel()
