"""Benchmark: novelty ranking of a large round against exact nearest-neighbour baselines.

Synthetic clustered data (our own invented mixture: low-rank Gaussian clusters in 64 float32
features, like robot states with few degrees of freedom), k = 10. Our path is
``app.sampler.novelty.novelty`` as the ranking job calls it: the search it chooses by sizes
(exact below about 1,000 candidates, faiss IVF-Flat above), on the threads the free cores allow.
Baselines measured in the same run: scikit-learn ``NearestNeighbors(algorithm="brute")`` and our
exact float64 numpy search. Exact search of 200k candidates against 1M states takes many
minutes, so the baselines run on a seeded subsample of candidates and their time is scaled
linearly to the full candidate count (brute-force query time is linear in the number of
queries); the script prints when it does so. Quality figures (recall@10, top-1% overlap,
Spearman) are computed on that subsample against the exact float64 search.

Our path runs in a child process of its own, as in a ranking worker: the faiss and scikit-learn
wheels share one OpenMP runtime, whose wait policy is fixed by whichever loads it first, so in
one process our passive waiting would also apply to the baseline (or its default to ours).

Each series runs twice: on the machine as it is ("quiet"), then beside a competing CPU-bound
process (one pure-Python spinning process per usable core, started before our run and the
baselines alike and stopped after). The load average is printed before and after each. Last,
a fresh process holding 1M candidates and 1M training states ranks them once, for peak memory.

Targets: >= 10x faster than scikit-learn exact, quiet and contended; >= 1x at the smallest
training set; the faster search chosen at every size; top-1% overlap >= 90%, Spearman >= 0.98;
peak memory at 1M x 1M < 1.5 GB.

    python bench/rank.py                 # full: 200k candidates, series 10k-1M, both runs, 1M x 1M
    python bench/rank.py --quick         # 20k vs 100k, series 10k,100k, both runs, no 1M x 1M
    python bench/rank.py --conditions quiet --no-memory-case
    python bench/rank.py --memory-case-only
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.stats import spearmanr

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from expertloop.sampler import novelty as nv  # noqa: E402
from expertloop.sampler import selection  # noqa: E402
from tests.helpers import recall_at_k  # noqa: E402

K = 10
N_FEATURES = 64


def clustered_states(
    rng: np.random.Generator, n: int, shifted_fraction: float = 0.0, n_clusters: int = 64
) -> np.ndarray:
    """Invented robot-like states: 64 clusters, each a rank-8 Gaussian plus small noise.

    ``shifted_fraction`` of the rows get their latent coordinates scaled by 2.5, standing in
    for states the training set has not covered (so novelty has a real tail to find).
    The cluster geometry is drawn from a fixed seed so training and candidates share it.
    """
    geometry = np.random.default_rng(12345)
    centres = geometry.standard_normal((n_clusters, N_FEATURES)) * 3.0
    bases = geometry.standard_normal((n_clusters, 8, N_FEATURES))
    scales = geometry.uniform(0.3, 1.5, (n_clusters, N_FEATURES))
    label = rng.integers(0, n_clusters, n)
    shifted = rng.random(n) < shifted_fraction
    out = np.empty((n, N_FEATURES), dtype=np.float32)
    for c in range(n_clusters):
        rows = np.flatnonzero(label == c)
        z = rng.standard_normal((rows.size, 8))
        z[shifted[rows]] *= 2.5
        x = centres[c] + (z @ bases[c]) * scales[c]
        out[rows] = x + 0.05 * rng.standard_normal((rows.size, N_FEATURES))
    return out


def peak_memory_gb() -> float:
    """Peak resident memory of this process image, in GB.

    VmHWM from /proc/self/status: ru_maxrss would also count the parent's memory at the fork
    that started this process (Linux carries it across exec), which for our child process is the
    bench holding the data and the baselines' leftovers.
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 2**20  # kB
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20  # kB on Linux


def load_average() -> str:
    return " / ".join(Path("/proc/loadavg").read_text().split()[:3])


def make_data(
    seed: int, n_candidates: int, n_training: int, n_sub: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    training = clustered_states(rng, n_training)
    candidates = clustered_states(rng, n_candidates, shifted_fraction=0.1)
    sub = np.sort(rng.choice(n_candidates, size=min(n_sub, n_candidates), replace=False))
    return training, candidates, sub


def _spin() -> None:
    while True:
        pass


@contextmanager
def competing_load(on: bool) -> Iterator[None]:
    """One CPU-bound process per usable core for the duration of the block (when ``on``)."""
    if not on:
        yield
        return
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    spinners = [ctx.Process(target=_spin, daemon=True) for _ in os.sched_getaffinity(0)]
    for p in spinners:
        p.start()
    time.sleep(1.0)  # the interpreters are up and spinning
    try:
        yield
    finally:
        for p in spinners:
            p.terminate()
        for p in spinners:
            p.join()


# ---------------------------------------------------------------------------------------------
# Our path, in a child process (``--ours``): regenerates the data from the seed, ranks, and
# writes its time, the subsample's neighbours and novelty, and its peak memory to a file.


def ours_child(args: argparse.Namespace) -> None:
    training, candidates, sub = make_data(
        args.seed, args.candidates, args.training, args.baseline_queries
    )
    training = training[: args.ours_training]
    inputs_gb = peak_memory_gb()
    exact = nv.exact_search_fits(len(candidates), len(training))
    rng_seed = args.seed
    t0 = time.perf_counter()
    ours = nv.novelty(candidates, training, K, rng=np.random.default_rng(rng_seed))
    ours_s = time.perf_counter() - t0
    memory_gb = peak_memory_gb()
    result: dict[str, object] = {
        "path": "exact numpy" if exact else "faiss IVF-Flat",
        "ours_s": ours_s,
        "inputs_gb": inputs_gb,
        "memory_gb": memory_gb,
    }
    if not args.memory_only:
        # The subsample's neighbours, from the same search: the index is built from the same
        # seed, and a query's answer does not depend on the other queries.
        standardiser = nv.Standardiser.fit(training)
        if exact:
            _, idx = nv.exact_knn_distances(
                standardiser.transform(candidates[sub]), standardiser.transform(training), K
            )
            # the other path at full size, to show the choice was the faster
            t0 = time.perf_counter()
            nv.novelty(candidates, training, K, exact_threshold=0)
            result["other_s"] = time.perf_counter() - t0
        else:
            dist, idx = nv.approximate_knn_distances(
                candidates[sub],
                training,
                K,
                rng=np.random.default_rng(rng_seed),
                standardiser=standardiser,
            )
            assert np.array_equal(dist.mean(axis=1), ours[sub]), "not the ranked search"
        np.save(args.out_idx, idx)
        np.save(args.out_novelty, ours[sub])
    Path(args.out_json).write_text(json.dumps(result))


def run_ours(args: argparse.Namespace, n_training: int, memory_only: bool = False) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        cmd = [
            sys.executable,
            __file__,
            "--ours",
            f"--candidates={args.candidates}",
            f"--training={args.training}",
            f"--ours-training={n_training}",
            f"--baseline-queries={args.baseline_queries}",
            f"--seed={args.seed}",
            f"--out-json={out / 'r.json'}",
            f"--out-idx={out / 'idx.npy'}",
            f"--out-novelty={out / 'nov.npy'}",
        ]
        if memory_only:
            cmd.append("--memory-only")
        subprocess.run(cmd, check=True)
        result = json.loads((out / "r.json").read_text())
        if not memory_only:
            result["idx"] = np.load(out / "idx.npy")
            result["novelty"] = np.load(out / "nov.npy")
    return result


# ---------------------------------------------------------------------------------------------


@dataclass
class Row:
    n_training: int
    path: str
    ours_s: float
    sklearn_s: float
    numpy_s: float
    other_s: float
    recall: float
    overlap: float
    spearman: float
    memory_gb: float


def run_size(
    args: argparse.Namespace,
    training: np.ndarray,
    candidates: np.ndarray,
    sub: np.ndarray,
) -> Row:
    from sklearn.neighbors import NearestNeighbors

    n_train, n_cand, n_sub = training.shape[0], candidates.shape[0], sub.size
    ours = run_ours(args, n_train)

    # Exact float64 numpy baseline on the subsample (also the ground truth).
    standardiser = nv.Standardiser.fit(training)
    train64 = standardiser.transform(training)
    sub64 = standardiser.transform(candidates[sub])
    t0 = time.perf_counter()
    exact_dist, exact_idx = nv.exact_knn_distances(sub64, train64, K)
    numpy_s = (time.perf_counter() - t0) * n_cand / n_sub
    del train64

    # scikit-learn exact brute force on the same standardised features (float32, as stored).
    train32 = standardiser.transform(training, np.float32)
    sub32 = standardiser.transform(candidates[sub], np.float32)
    t0 = time.perf_counter()
    nn = NearestNeighbors(n_neighbors=K, algorithm="brute").fit(train32)
    nn.kneighbors(sub32)
    sklearn_s = (time.perf_counter() - t0) * n_cand / n_sub
    del train32, nn

    exact_novelty = exact_dist.mean(axis=1)
    ours_sub = ours["novelty"]
    top = max(1, int(round(0.01 * n_sub)))
    top_ours = set(np.argsort(-ours_sub, kind="stable")[:top].tolist())
    top_exact = set(np.argsort(-exact_novelty, kind="stable")[:top].tolist())
    return Row(
        n_training=n_train,
        path=ours["path"],
        ours_s=ours["ours_s"],
        sklearn_s=sklearn_s,
        numpy_s=numpy_s,
        # the path not taken: exact numpy (scaled) when the index ran, the index when exact ran
        other_s=ours.get("other_s", numpy_s),
        recall=recall_at_k(ours["idx"], exact_idx),
        overlap=len(top_ours & top_exact) / top,
        spearman=float(spearmanr(ours_sub, exact_novelty).statistic),
        memory_gb=ours["memory_gb"],
    )


def print_row(row: Row) -> None:
    right = "yes" if row.ours_s <= row.other_s else "NO"
    print(
        f"  N={row.n_training:>9,d}  {row.path:<15s} ours {row.ours_s:7.2f} s | "
        f"sklearn brute {row.sklearn_s:8.1f} s (x{row.sklearn_s / row.ours_s:6.1f}) | "
        f"numpy exact {row.numpy_s:8.1f} s (x{row.numpy_s / row.ours_s:6.1f}) | "
        f"other path {row.other_s:7.1f} s (faster chosen: {right}) | "
        f"recall@10 {row.recall:.4f} | top-1% overlap {row.overlap:.3f} | "
        f"Spearman {row.spearman:.4f} | peak {row.memory_gb:.2f} GB",
        flush=True,
    )


def run_series(
    args: argparse.Namespace,
    series: list[int],
    training: np.ndarray,
    candidates: np.ndarray,
    sub: np.ndarray,
    contended: bool,
) -> list[Row]:
    name = "contended (one spinning process per core)" if contended else "quiet"
    print(f"\n{name}: load average before {load_average()}", flush=True)
    rows = []
    with competing_load(contended):
        for n in series:
            row = run_size(args, training[:n], candidates, sub)
            rows.append(row)
            print_row(row)
    print(f"{name}: load average after {load_average()}", flush=True)
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--candidates", type=int, default=200_000)
    parser.add_argument("--training", type=int, default=1_000_000)
    parser.add_argument("--baseline-queries", type=int, default=5_000)
    parser.add_argument("--series", default="10000,100000,1000000")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--quick", action="store_true", help="20k vs 100k, series 10k,100k")
    parser.add_argument("--conditions", default="quiet,contended")
    parser.add_argument(
        "--memory-case",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="rank 1M x 1M once in a fresh process for peak memory (default: on unless --quick)",
    )
    parser.add_argument("--memory-case-only", action="store_true")
    # the child process running our path
    parser.add_argument("--ours", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--memory-only", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--ours-training", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--out-json", help=argparse.SUPPRESS)
    parser.add_argument("--out-idx", help=argparse.SUPPRESS)
    parser.add_argument("--out-novelty", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.ours:
        ours_child(args)
        return
    if args.quick:
        args.candidates, args.training, args.baseline_queries = 20_000, 100_000, 1_000
        args.series = "10000,100000"
    memory_case = (not args.quick) if args.memory_case is None else args.memory_case
    print(f"started {time.strftime('%Y-%m-%d %H:%M:%S %Z')}; load average {load_average()}")
    if not args.memory_case_only:
        series_and_summary(args)
    if memory_case or args.memory_case_only:
        memory_run(args)


def series_and_summary(args: argparse.Namespace) -> None:
    series = sorted({int(s) for s in args.series.split(",") if s} | {args.training})
    series = [n for n in series if n <= args.training]
    conditions = [c for c in args.conditions.split(",") if c]

    t0 = time.perf_counter()
    training, candidates, sub = make_data(
        args.seed, args.candidates, args.training, args.baseline_queries
    )
    print(
        f"data: {args.candidates:,d} candidates x {args.training:,d} training states, "
        f"{N_FEATURES} float32 features, k={K}, clustered (generated in "
        f"{time.perf_counter() - t0:.1f} s); our path runs in a child process"
    )
    print(
        f"exact baselines run on {sub.size:,d} sampled candidates and are scaled linearly "
        f"x{args.candidates / sub.size:.0f} to {args.candidates:,d}; quality measured on them"
    )

    results = {
        c: run_series(args, series, training, candidates, sub, c == "contended") for c in conditions
    }

    print(f"\nmain case: {args.candidates:,d} candidates vs {args.training:,d} training states")
    for condition, rows in results.items():
        main_row, small = rows[-1], rows[0]
        print(f"  {condition}:")
        print(f"    our novelty ({main_row.path}): {main_row.ours_s:.2f} s")
        print(
            f"    speed vs sklearn exact brute: x{main_row.sklearn_s / main_row.ours_s:.1f} "
            "(target >= 10)"
        )
        print(
            f"    at the smallest ({small.n_training:,d}): "
            f"x{small.sklearn_s / small.ours_s:.1f} (target >= 1)"
        )
        print(f"    speed vs numpy exact float64: x{main_row.numpy_s / main_row.ours_s:.1f}")
        wrong = [r.n_training for r in rows if r.ours_s > r.other_s]
        print(f"    faster search chosen at every size: {'yes' if not wrong else f'NO at {wrong}'}")
        print(f"    recall@10: {main_row.recall:.4f}")
        print(f"    top-1% overlap: {main_row.overlap:.3f} (target >= 0.90)")
        print(f"    Spearman: {main_row.spearman:.4f} (target >= 0.98)")

    # Build cost matters as the training set grows
    # (docs/references.md, "Approximate nearest-neighbour search").
    standardised = nv.Standardiser.fit(training).transform(training, np.float32)
    t0 = time.perf_counter()
    nv.build_ivf_index(standardised, rng=np.random.default_rng(args.seed))
    print(
        f"  IVF build alone at {args.training:,d} (this process: all cores, the OpenMP waiting "
        f"scikit-learn loaded): {time.perf_counter() - t0:.2f} s"
    )
    del standardised

    # Selection over the same round: budget 2% of candidates, a 5-step gap, 10% audit.
    rng = np.random.default_rng(args.seed + 1)
    rollout = rng.integers(0, max(1, args.candidates // 500), args.candidates)
    positions = rng.integers(0, 5000, args.candidates)
    t0 = time.perf_counter()
    result = selection.select(
        rng.random(args.candidates),
        rollout,
        positions,
        max(1, args.candidates // 50),
        min_gap=5,
        rng=np.random.default_rng(args.seed),
    )
    print(
        f"  select(): {result.indices.size:,d} of {args.candidates:,d} chosen in "
        f"{time.perf_counter() - t0:.3f} s"
    )
    main_rows = [rows[-1] for rows in results.values()]
    print(
        f"  peak memory (VmHWM) of our child process at {args.candidates:,d} x "
        f"{args.training:,d}: {max(r.memory_gb for r in main_rows):.2f} GB"
    )


def memory_run(args: argparse.Namespace) -> None:
    n = 1_000_000
    print(
        f"\nmemory case: {n:,d} candidates x {n:,d} training states in a fresh process; "
        f"load average before {load_average()}",
        flush=True,
    )
    mem_args = argparse.Namespace(**{**vars(args), "candidates": n, "training": n})
    result = run_ours(mem_args, n, memory_only=True)
    print(
        f"  ranked in {result['ours_s']:.1f} s ({result['path']}); peak memory (VmHWM) "
        f"{result['memory_gb']:.2f} GB, of which {result['inputs_gb']:.2f} GB was reached "
        f"generating and holding the inputs (target < 1.5 GB); "
        f"load average after {load_average()}",
        flush=True,
    )


if __name__ == "__main__":
    main()
