"""Threads for the nearest-neighbour search: the choice, the measurement, and that results do
not depend on it (app/sampler/cores.py)."""

import multiprocessing
import os
import subprocess
import sys
import time
import tracemalloc

import numpy as np
import pytest
from numpy.testing import assert_array_equal
from threadpoolctl import threadpool_info

from expertloop.sampler import cores
from expertloop.sampler import novelty as nv
from tests.unit.test_sampler_novelty import clustered


@pytest.mark.parametrize(
    ("free", "n_cores", "threads"),
    [
        (2.0, 2, 2),
        (1.5, 2, 2),  # half a core free or more earns a thread
        (1.49, 2, 1),
        (0.6, 2, 1),
        (0.0, 2, 1),  # never fewer than one
        (2.7, 2, 2),  # never more than the usable cores
        (3.2, 8, 3),
        (7.5, 8, 8),
    ],
)
def test_threads_for_free_cores(free, n_cores, threads):
    # hand-checkable: round half up, clamped to [1, n_cores]
    assert cores.threads_for(free, n_cores) == threads


def test_threads_for_refuses_no_cores():
    with pytest.raises(ValueError, match="n_cores"):
        cores.threads_for(1.0, 0)


PROC_STAT = """cpu  900 0 300 5000 40 0 10 0 0 0
cpu0 100 5 50 2000 20 3 2 7 11 0
cpu1 800 0 250 3000 20 0 8 0 0 0
cpu2 1 1 1 1 1 1 1 1 0 0
intr 12345
ctxt 999
"""


def test_parse_proc_stat_counts_busy_fields_of_usable_cpus():
    # docs/references.md, "Thread pools on a shared machine": the fields of /proc/stat are
    # user nice system idle iowait irq softirq steal guest guest_nice; busy by hand for cpu0 and cpu1: (100+5+50+3+2+7) + (800+0+250+0+8+0) = 167 + 1058
    assert cores.parse_proc_stat(PROC_STAT, {0, 1}, 100.0) == pytest.approx(12.25)
    assert cores.parse_proc_stat(PROC_STAT, {2}, 100.0) == pytest.approx(0.06)
    assert cores.parse_proc_stat(PROC_STAT, {0, 5}, 100.0) is None  # cpu5 missing


def test_free_between_subtracts_our_own_cpu_time():
    before = cores.CpuSample(at=10.0, busy_s=100.0, own_s=5.0)
    # 2 s on 2 cores: 3.0 busy seconds, 1.0 of them ours -> others used 1 core -> 1 free
    after = cores.CpuSample(at=12.0, busy_s=103.0, own_s=6.0)
    assert cores.free_between(before, after, 2) == pytest.approx(1.0)
    # all of it ours: both cores free
    assert cores.free_between(before, cores.CpuSample(12.0, 103.0, 8.0), 2) == pytest.approx(2.0)
    # clamped to [0, n_cores] (tick rounding can overshoot either way)
    assert cores.free_between(before, cores.CpuSample(12.0, 106.0, 5.0), 2) == 0.0
    assert cores.free_between(before, cores.CpuSample(12.0, 100.0, 6.0), 2) == 2.0
    assert cores.free_between(before, before, 2) == 2.0  # no time: nothing known


def _spin(seconds: float) -> None:
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        pass


@pytest.mark.skipif(not os.path.exists("/proc/stat"), reason="Linux /proc/stat")
def test_meter_sees_other_processes_take_every_core():
    # One spinning process per usable CPU: whatever else runs, no core is left free to us.
    n = len(os.sched_getaffinity(0))
    ctx = multiprocessing.get_context("spawn")
    spinners = [ctx.Process(target=_spin, args=(3.0,)) for _ in range(n)]
    for p in spinners:
        p.start()
    try:
        time.sleep(0.5)  # spawned interpreters are spinning by now
        meter = cores.start_meter(0.3)
        free = meter.free_cores()
        threads = cores.threads_for(free, meter.n_cores)
    finally:
        for p in spinners:
            p.terminate()
            p.join()
    assert free < 0.5
    assert threads == 1


def test_load_faiss_asks_for_passive_openmp_waiting_unless_told_otherwise():
    # libgomp reads OMP_WAIT_POLICY when it loads (docs/references.md, "Thread pools on a
    # shared machine"): a fresh interpreter shows what load_faiss put in the environment before faiss loaded.
    code = (
        "import os, sys; from expertloop.sampler import cores; cores.load_faiss(); "
        "print(os.environ['OMP_WAIT_POLICY'], 'faiss' in sys.modules)"
    )
    env = {k: v for k, v in os.environ.items() if k != "OMP_WAIT_POLICY"}
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True)
    assert out.stdout.split() == ["PASSIVE", "True"], out.stderr
    env["OMP_WAIT_POLICY"] = "ACTIVE"
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True)
    assert out.stdout.split() == ["ACTIVE", "True"], out.stderr


def _pool_threads() -> set[int]:
    return {p["num_threads"] for p in threadpool_info()}


def test_paced_search_runs_on_the_threads_the_meter_allows(monkeypatch):
    cores.load_faiss()
    before = _pool_threads()
    seen: list[set[int]] = []
    monkeypatch.setattr(cores.CpuMeter, "free_cores", lambda self: 0.2)
    with nv._paced(1e12) as pace:
        assert pace is not None
        pace()
        seen.append(_pool_threads())
    # every loaded pool, faiss's OpenMP and the OpenBLAS libraries, on one thread, as
    # threadpoolctl reports them (docs/references.md, "Thread pools on a shared machine")
    assert seen == [{1}]
    assert _pool_threads() == before  # restored
    with nv._paced(1.0) as pace:  # a fraction of a second of work is not measured
        assert pace is None


def test_thread_count_does_not_change_novelty():
    # A rerun of a ranking job must give the same selection whatever cores were free.
    rng = np.random.default_rng(11)
    training = clustered(rng, 30_000, dim=16)
    candidates = clustered(rng, 3_000, dim=16)
    cores.load_faiss()
    found = {}
    for threads in (1, 2):
        with cores.limited_threads(threads):
            found[threads] = (
                nv.novelty(candidates, training, k=10),  # the index
                nv.novelty(candidates[:1500], training[:20_000], exact_threshold=10**6),
            )
    assert_array_equal(found[1][0], found[2][0])
    assert_array_equal(found[1][1], found[2][1])


def test_novelty_makes_no_standardised_copy_of_the_training_set(monkeypatch):
    # Memory at a million training states: the index holds the only standardised copy, and
    # candidates are standardised a chunk at a time. tracemalloc sees numpy's allocations
    # (docs/references.md, "Thread pools on a shared machine").
    monkeypatch.setattr(nv, "_FAISS_CHUNK", 4096)
    monkeypatch.setattr(nv, "_TRANSFORM_CHUNK", 4096)
    rng = np.random.default_rng(12)
    training = clustered(rng, 200_000, dim=8)
    candidates = clustered(rng, 20_000, dim=8)
    cores.load_faiss()  # importing the module's Python code would count too
    tracemalloc.start()
    try:
        nv.novelty(candidates, training, k=10)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    # A float32 copy of the training set alone would be training.nbytes (6.4 MB); the
    # k-means sample (64 rows a list, 2 sqrt(N) lists: 29% of the rows here) and its row
    # numbers are the largest arrays left (measured: 58% of training.nbytes at the peak).
    assert peak < 0.75 * training.nbytes
