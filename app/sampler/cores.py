"""Threads for the nearest-neighbour search on a machine whose cores other work shares.

Two thread pools do the search's work: faiss's OpenMP team (the faiss-cpu wheel ships its own
libgomp, which also threads the OpenBLAS bundled with faiss) and numpy's OpenBLAS (pthreads).
Both busy-wait for work by default. On a shared machine a waiting thread spins on a core that a
descheduled team mate needs, so every parallel region waits for a time slice: measured on two
cores beside other work (load average 12-15, two runs each), the k-means of a 200k-state index
took 3.5-4.0 s of CPU with libgomp's default waiting, 1.4-1.5 s with passive waiting and 1.2 s
on one thread. Two choices follow:

* the OpenMP wait policy is passive (``OMP_WAIT_POLICY=PASSIVE``): libgomp reads it once, when
  it loads, so it is set when the job handlers are registered and again just before faiss is
  first imported (:func:`load_faiss`), unless the environment already sets it;
* the thread count is the number of cores other processes leave free, measured from
  ``/proc/stat`` over a short window on the CPUs this process may run on
  (``os.sched_getaffinity``), minus this process's own CPU time. The load average is no use
  here: it trails by a minute and counts our own earlier work. The count is measured again
  between chunks of the search, so a search that started on an idle machine gives up cores
  when other work arrives, which keeps them for the web server and the annotators' requests.

Thread counts do not change results: the search splits work by query and by output block,
never inside one sum (``tests/unit/test_sampler_cores.py`` checks it).
"""

from __future__ import annotations

import math
import os
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from threadpoolctl import ThreadpoolController

from ..shared.cpu_quota import usable_cores

WAIT_POLICY = "PASSIVE"
# Seconds of /proc/stat read before the search starts: 5 clock ticks a core at USER_HZ 100,
# enough to tell a busy core from a free one (the count is rounded to whole cores).
DEFAULT_WINDOW_S = 0.05
# Shorter stretches say nothing at that resolution: the meter keeps its previous answer.
_MIN_WINDOW_S = 0.04
_PROC_STAT = "/proc/stat"


def prefer_passive_waiting() -> None:
    """Ask for passive OpenMP waiting unless the environment says otherwise.

    Effective only before the process first loads libgomp: the faiss and scikit-learn wheels
    ship the same libgomp (one soname, so one copy per process), and whichever loads it first
    fixes its wait policy for both. Child processes inherit the setting.
    """
    os.environ.setdefault("OMP_WAIT_POLICY", WAIT_POLICY)


def load_faiss() -> Any:
    """Import faiss, with passive OpenMP waiting unless faiss is loaded or the policy is set."""
    if "faiss" not in sys.modules:
        prefer_passive_waiting()
    import faiss

    return faiss


def threads_for(free_cores: float, n_cores: int) -> int:
    """Threads to run given the cores other work leaves free, of ``n_cores`` usable.

    A thread is started for each core at least half free (round half up), never fewer than
    one and never more than ``n_cores``: a thread that gets less than half a core holds its
    team back at every join by more than it adds.
    """
    if n_cores < 1:
        raise ValueError(f"n_cores must be >= 1, got {n_cores}")
    return max(1, min(n_cores, math.floor(free_cores + 0.5)))


@dataclass(frozen=True)
class CpuSample:
    """Busy seconds of the usable CPUs (all processes) and this process's CPU seconds."""

    at: float
    busy_s: float
    own_s: float


def free_between(before: CpuSample, after: CpuSample, n_cores: int) -> float:
    """Cores left free by other processes between two samples, in [0, n_cores].

    Other processes' use is the CPUs' busy time less this process's own; with no time
    between the samples nothing is known and every core counts as free.
    """
    elapsed = after.at - before.at
    if elapsed <= 0:
        return float(n_cores)
    others = ((after.busy_s - before.busy_s) - (after.own_s - before.own_s)) / elapsed
    return min(float(n_cores), max(0.0, n_cores - others))


def parse_proc_stat(text: str, cpus: set[int], ticks_per_s: float) -> float | None:
    """Busy seconds of ``cpus`` from the text of ``/proc/stat``; None if a CPU is missing.

    Busy is every field but idle and iowait (user, nice, system, irq, softirq, steal; guest
    time is already inside user). Steal counts as busy: the hypervisor gave the core to
    someone else.
    """
    busy = 0
    found: set[int] = set()
    for line in text.splitlines():
        name, _, rest = line.partition(" ")
        if not name.startswith("cpu") or name == "cpu":
            continue
        try:
            cpu = int(name[3:])
        except ValueError:
            continue
        if cpu not in cpus:
            continue
        fields = [int(f) for f in rest.split()]
        user, nice, system, _idle, _iowait, irq, softirq, steal = (fields + [0] * 8)[:8]
        busy += user + nice + system + irq + softirq + steal
        found.add(cpu)
    if found != cpus:
        return None
    return busy / ticks_per_s


class CpuMeter:
    """Measures the cores other processes leave free to this one (Linux ``/proc/stat``).

    Where ``/proc/stat`` cannot be read, every usable core counts as free (the libraries'
    own default).
    """

    def __init__(self) -> None:
        self.cpus = set(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else set()
        self.n_cores = max(1, len(self.cpus) or (os.cpu_count() or 1))
        # a container's CPU quota caps the threads, whatever the host's cores leave free
        self.allowed = usable_cores(self.n_cores)
        try:
            self._ticks = float(os.sysconf("SC_CLK_TCK"))
        except (AttributeError, ValueError, OSError):
            self._ticks = 100.0
        self._last = self.sample()
        self._free = float(self.n_cores)

    def sample(self) -> CpuSample | None:
        try:
            with open(_PROC_STAT) as f:
                busy = parse_proc_stat(f.read(), self.cpus, self._ticks)
        except OSError:
            return None
        if busy is None:
            return None
        return CpuSample(at=time.monotonic(), busy_s=busy, own_s=time.process_time())

    def free_cores(self) -> float:
        """Cores free of other work since the previous call (or since the meter was made);
        after less than 40 ms, the previous answer (all cores before the first)."""
        now = self.sample()
        before = self._last
        if before is None or now is None:
            self._last = now
            return self._free
        if now.at - before.at >= _MIN_WINDOW_S:
            self._free = free_between(before, now, self.n_cores)
            self._last = now
        return self._free

    def threads(self) -> int:
        """Threads for the next stretch of work: :func:`threads_for` the cores free since the
        previous call, at most the cores a container's CPU quota allows."""
        return min(self.allowed, threads_for(self.free_cores(), self.n_cores))


def start_meter(window_s: float = DEFAULT_WINDOW_S) -> CpuMeter:
    """A meter that has already watched the CPUs for ``window_s`` seconds while we were idle."""
    meter = CpuMeter()
    time.sleep(window_s)
    return meter


class ThreadLimit:
    """Limits the BLAS and OpenMP pools loaded in this process; ``set`` may change the limit.

    threadpoolctl finds the pools loaded when the limit is set: load faiss (:func:`load_faiss`)
    before setting one for a faiss search. OpenBLAS's limit is process-wide and OpenMP's
    applies to the calling thread, the one that calls faiss.
    """

    def __init__(self) -> None:
        self._controller = ThreadpoolController()
        self._first: Any = None  # the first limiter remembers the limits found
        self.threads: int | None = None

    def set(self, threads: int) -> None:
        if threads != self.threads:
            limiter = self._controller.limit(limits=threads)
            if self._first is None:
                self._first = limiter
            self.threads = threads

    def restore(self) -> None:
        if self._first is not None:
            self._first.restore_original_limits()
            self._first, self.threads = None, None


@contextmanager
def limited_threads(threads: int) -> Iterator[ThreadLimit]:
    """Run the block with at most ``threads`` threads in every loaded pool, then restore."""
    limit = ThreadLimit()
    limit.set(threads)
    try:
        yield limit
    finally:
        limit.restore()
