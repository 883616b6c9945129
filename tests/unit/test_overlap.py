"""Work handed to a thread of its own (app/shared/overlap.py): same results, in order, bounded.

The reference for every result is the work run in the caller's thread with Python's built-in
`map` and a plain loop.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator

import pytest

from expertloop.shared.overlap import LANES, alongside, mapped_ahead


class Source:
    """Items 0..n-1, counting how many were taken."""

    def __init__(self, n: int) -> None:
        self.n = n
        self.taken = 0

    def __iter__(self) -> Iterator[int]:
        for i in range(self.n):
            self.taken += 1
            yield i


def _slow_square(x: int) -> int:
    time.sleep(0.001 * (x % 3))  # uneven work, so order is not a matter of luck
    return x * x


@pytest.mark.parametrize("depth", [1, 2, 5])
def test_mapped_ahead_gives_map_in_order_on_another_thread(depth):
    threads: set[int] = set()

    def work(x: int) -> int:
        threads.add(threading.get_ident())
        return _slow_square(x)

    got = list(mapped_ahead(range(40), work, depth=depth, name="test"))
    assert got == list(map(_slow_square, range(40)))
    assert threads and threading.get_ident() not in threads


@pytest.mark.parametrize("depth", [1, 3])
def test_mapped_ahead_takes_at_most_depth_items_ahead(depth):
    source = Source(30)
    for received, _ in enumerate(mapped_ahead(source, _slow_square, depth=depth, name="test")):
        # the item handed over, `depth` more in the worker's hands, none beyond
        assert source.taken <= received + 1 + depth


def test_alongside_passes_items_through_and_finishes_all_work_in_order():
    done: list[int] = []
    items = list(range(25))
    seen = list(alongside(items, lambda x: done.append(_slow_square(x)), depth=2, name="test"))
    assert seen == items
    assert done == [x * x for x in items]  # every item's work, in item order, before the end


@pytest.mark.parametrize("depth", [1, 2])
def test_alongside_keeps_at_most_depth_items_waiting(depth):
    done: list[int] = []
    gate = threading.Event()

    def work(x: int) -> None:
        gate.wait(5)
        done.append(x)

    source = Source(10)
    received: list[int] = []
    stream = alongside(source, work, depth=depth, name="test")
    taker = threading.Thread(target=lambda: received.extend(stream))
    taker.start()
    time.sleep(0.2)  # the taker wants every item, but no work can finish
    assert source.taken == depth + 1  # then the stream waits for the oldest item's work
    gate.set()
    taker.join(5)
    assert received == done == list(range(10))


def test_an_error_of_the_work_reaches_the_caller_and_stops_the_stream():
    def work(x: int) -> int:
        if x == 7:
            raise ValueError("item 7 is bad")
        return x

    with pytest.raises(ValueError, match="item 7"):
        list(mapped_ahead(range(100), work, depth=2, name="test"))
    with pytest.raises(ValueError, match="item 7"):
        list(alongside(range(100), work, depth=2, name="test"))


@pytest.mark.parametrize("helper", [mapped_ahead, alongside])
def test_a_stream_closed_early_runs_no_work_after_it_returns(helper):
    calls: list[int] = []

    def work(x: int) -> int:
        time.sleep(0.005)
        calls.append(x)
        return x

    stream = helper(range(1000), work, depth=2, name="test")
    next(stream)
    stream.close()  # the client went away: the work in hand finishes, the rest never starts
    after_close = len(calls)
    time.sleep(0.05)
    assert len(calls) == after_close <= 4


def test_streams_one_after_another_reuse_their_threads():
    """Threads live across streams: the tenth pass of a three-lane pipeline starts none."""

    def pipeline() -> list[int]:
        hashed: list[int] = []
        stream = mapped_ahead(range(30), _slow_square, depth=1, name="test")
        stream = alongside(stream, hashed.append, depth=1, name="test")
        got = list(alongside(stream, lambda x: None, depth=2, name="test"))
        assert hashed == got
        return got

    assert pipeline() == list(map(_slow_square, range(30)))
    started, threads = LANES.started, threading.active_count()
    for _ in range(9):
        assert pipeline() == list(map(_slow_square, range(30)))
    assert LANES.started == started
    assert threading.active_count() == threads
