"""Work handed to a thread of its own (app/shared/overlap.py): same results, in order, bounded.

The reference for every result is the work run in the caller's thread with Python's built-in
`map` and a plain loop.
"""

from __future__ import annotations

import gc
import threading
import time
from collections.abc import Iterator

import pytest

from expertloop.shared.overlap import LANES, Ahead, alongside, mapped_ahead


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


class Closing:
    """A stream of items 0..n-1 that records the thread it ran on and whether it was closed."""

    def __init__(self, n: int, fail_at: int | None = None) -> None:
        self.n, self.fail_at = n, fail_at
        self.taken = 0
        self.threads: set[int] = set()
        self.closed_on: int | None = None

    def __call__(self) -> Iterator[int]:
        self.threads.add(threading.get_ident())
        try:
            for i in range(self.n):
                if i == self.fail_at:
                    raise ValueError(f"item {i} is bad")
                self.taken += 1
                yield i
        finally:
            self.closed_on = threading.get_ident()


def test_ahead_gives_every_item_in_order_made_on_another_thread():
    source = Closing(50)
    assert list(Ahead(source, depth=2, name="test")) == list(range(50))
    assert source.threads and threading.get_ident() not in source.threads
    assert source.closed_on in source.threads  # the stream ended on its own thread


@pytest.mark.parametrize("depth", [1, 2])
def test_ahead_makes_at_most_depth_items_ahead_of_the_taker(depth):
    source = Closing(20)
    stream = Ahead(source, depth=depth, name="test")
    for received, _ in enumerate(stream, start=1):
        time.sleep(0.01)  # a slow taker: the producer would run ahead if it could
        # handed over, `depth` waiting, one more in the producer's hands
        assert source.taken <= received + depth + 1


def test_an_error_of_the_producer_reaches_the_taker_after_the_items_before_it():
    got: list[int] = []
    with pytest.raises(ValueError, match="item 7"):
        for item in Ahead(Closing(20, fail_at=7), depth=2, name="test"):
            got.append(item)
    assert got == list(range(7))


def test_closing_early_stops_the_producer_and_closes_its_stream_on_its_thread():
    source = Closing(1000)
    idle = LANES.idle()
    stream = Ahead(source, depth=2, name="test")
    assert next(stream) == 0
    stream.close()  # the client went away
    assert source.closed_on in source.threads  # closed on the producer's thread, before close()
    taken = source.taken
    time.sleep(0.05)
    assert source.taken == taken <= 4
    assert LANES.idle() >= idle  # the lane went back


def test_dropping_the_stream_stops_the_producer():
    """A server that abandons a response without closing it (the client went away) only drops
    it; the producer must not stay blocked, holding its lane and whatever its stream opened."""
    source = Closing(1000)
    stream = Ahead(source, depth=1, name="test")
    assert next(stream) == 0
    del stream
    gc.collect()
    deadline = time.monotonic() + 5
    while source.closed_on is None and time.monotonic() < deadline:
        time.sleep(0.01)
    assert source.closed_on in source.threads
    assert source.taken <= 3
