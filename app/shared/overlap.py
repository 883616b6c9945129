"""Work on a stream of items handed to a thread of its own, so that it overlaps the caller's.

A rebuilt export reads pages from the store, re-checks their content hash, encodes them and
hashes and writes the stored file. Each of these spends most of its time in C code that releases
the GIL (the database driver, hashlib on buffers over 2 KB, pyarrow's writer), so on a machine
with two cores they run side by side when each has a thread. Every helper here keeps at most
`depth` items in the hands of its thread: memory stays bounded by a few items, whatever the
length of the stream. Work runs in item order on one thread, so it may keep state (a running
hash, a file being written).

The threads are lanes that live as long as the process and serve one stream after another
(`LANES`): an export no longer starts (and ends) three threads, and the number of threads of a
server stays the same however many exports it serves, one after another.
"""

from __future__ import annotations

import threading
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor, wait
from contextlib import contextmanager
from typing import TypeVar

T = TypeVar("T")
R = TypeVar("R")

# idle lanes kept for the next stream: a rebuilt export or a new version takes three at once,
# so two or three at the same time find theirs; a lane beyond this ends when its stream does
KEEP_IDLE_LANES = 8


class Lanes:
    """Single-thread workers lent to one stream at a time and kept for the next."""

    def __init__(self, keep_idle: int) -> None:
        self._keep_idle = keep_idle
        self._idle: list[ThreadPoolExecutor] = []
        self._lock = threading.Lock()
        self.started = 0  # lanes made so far (tests: repeated streams reuse them)

    @contextmanager
    def lane(self, name: str) -> Iterator[ThreadPoolExecutor]:
        """A worker of one thread for the block, kept for the next stream after it; the block
        must leave no work running on it. `name` says what for (profilers show it)."""
        with self._lock:
            worker = self._idle.pop() if self._idle else None
            if worker is None:
                self.started += 1
                worker = ThreadPoolExecutor(max_workers=1, thread_name_prefix="expertloop-lane")
        worker.submit(_rename, name)
        try:
            yield worker
        finally:
            with self._lock:
                kept = len(self._idle) < self._keep_idle
                if kept:
                    self._idle.append(worker)
            if not kept:
                worker.shutdown(wait=False)


def _rename(name: str) -> None:
    threading.current_thread().name = f"lane-{name}"


LANES = Lanes(KEEP_IDLE_LANES)


def _finish(pending: deque[Future[R]]) -> None:
    """Cancel work not started and wait for the work running: the lane goes back idle."""
    for left in pending:
        left.cancel()
    wait(pending)


def alongside(
    items: Iterable[T], work: Callable[[T], object], *, depth: int, name: str
) -> Iterator[T]:
    """Each item at once, while `work(item)` runs on a thread of its own, in item order.

    At most `depth` items wait for their work; the stream ends only once all work is done, and
    an error of the work is raised in the caller's thread (at the latest when the last item has
    been taken). Items must not be changed by the caller while their work may still run.
    """
    with LANES.lane(name) as worker:
        pending: deque[Future[object]] = deque()
        try:
            for item in items:
                pending.append(worker.submit(work, item))
                while len(pending) > depth:
                    pending.popleft().result()
                yield item
            while pending:
                pending.popleft().result()
        finally:  # stopped early or failed: the rest is not needed
            _finish(pending)


def mapped_ahead(
    items: Iterable[T], work: Callable[[T], R], *, depth: int, name: str
) -> Iterator[R]:
    """`work(item)` of every item, in order, computed on a thread of its own up to `depth`
    items ahead of the caller, who meanwhile takes the next items."""
    with LANES.lane(name) as worker:
        pending: deque[Future[R]] = deque()
        try:
            for item in items:
                pending.append(worker.submit(work, item))
                if len(pending) > depth:
                    yield pending.popleft().result()
            while pending:
                yield pending.popleft().result()
        finally:
            _finish(pending)
