"""Benchmark: novelty ranking of a large round against exact nearest-neighbour baselines.

Synthetic clustered data (our own invented mixture: low-rank Gaussian clusters in 64 float32
features, like robot states with few degrees of freedom), k = 10. Our path is the one
``app.sampler.novelty.novelty`` takes (standardise on the training set; exact chunked numpy up
to 50k training states, faiss IVF-Flat above). Baselines measured in the same run:
scikit-learn ``NearestNeighbors(algorithm="brute")`` and our exact float64 numpy search.
Exact search of 200k candidates against 1M states takes many minutes, so the baselines run on
a seeded subsample of candidates and their time is scaled linearly to the full candidate count
(brute-force query time is linear in the number of queries); the script prints when it does so.
Quality figures (recall@10, top-1% overlap, Spearman) are computed on that subsample against
the exact float64 search.

Targets: >= 10x faster than scikit-learn exact, top-1% overlap >= 90%, Spearman >= 0.98,
peak memory < 2 GB.

    python bench/rank.py                 # full: 200k candidates, 1M training, series 10k-1M
    python bench/rank.py --quick         # under a minute
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.stats import spearmanr
from sklearn.neighbors import NearestNeighbors

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
    # ru_maxrss is in kilobytes on Linux
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20


@dataclass
class Row:
    n_training: int
    path: str
    ours_s: float
    sklearn_s: float
    numpy_s: float
    recall: float
    overlap: float
    spearman: float
    memory_after_ours_gb: float


def run_size(
    training: np.ndarray,
    candidates: np.ndarray,
    sub: np.ndarray,
    seed: int,
    exact_threshold: int,
) -> Row:
    n_train, n_cand, n_sub = training.shape[0], candidates.shape[0], sub.size
    path = "exact numpy" if n_train <= exact_threshold else "faiss IVF-Flat"

    # Ours: exactly the steps of novelty(), split so the indices are available for recall.
    t0 = time.perf_counter()
    standardiser = nv.Standardiser.fit(training)
    if n_train <= exact_threshold:
        dist, idx = nv.exact_knn_distances(
            standardiser.transform(candidates), standardiser.transform(training), K
        )
    else:
        dist, idx = nv.approximate_knn_distances(
            standardiser.transform(candidates, np.float32),
            standardiser.transform(training, np.float32),
            K,
            rng=np.random.default_rng(seed),
        )
    ours_novelty = dist.mean(axis=1)
    ours_s = time.perf_counter() - t0
    memory_after_ours_gb = peak_memory_gb()

    # Exact float64 numpy baseline on the subsample (also the ground truth).
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
    ours_sub = ours_novelty[sub]
    top = max(1, int(round(0.01 * n_sub)))
    top_ours = set(np.argsort(-ours_sub, kind="stable")[:top].tolist())
    top_exact = set(np.argsort(-exact_novelty, kind="stable")[:top].tolist())
    return Row(
        n_training=n_train,
        path=path,
        ours_s=ours_s,
        sklearn_s=sklearn_s,
        numpy_s=numpy_s,
        recall=recall_at_k(idx[sub], exact_idx),
        overlap=len(top_ours & top_exact) / top,
        spearman=float(spearmanr(ours_sub, exact_novelty).statistic),
        memory_after_ours_gb=memory_after_ours_gb,
    )


def print_row(row: Row) -> None:
    print(
        f"  N={row.n_training:>9,d}  {row.path:<15s} ours {row.ours_s:7.2f} s | "
        f"sklearn brute {row.sklearn_s:8.1f} s (x{row.sklearn_s / row.ours_s:6.1f}) | "
        f"numpy exact {row.numpy_s:8.1f} s (x{row.numpy_s / row.ours_s:6.1f}) | "
        f"recall@10 {row.recall:.4f} | top-1% overlap {row.overlap:.3f} | "
        f"Spearman {row.spearman:.4f}",
        flush=True,
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--candidates", type=int, default=200_000)
    parser.add_argument("--training", type=int, default=1_000_000)
    parser.add_argument("--baseline-queries", type=int, default=5_000)
    parser.add_argument("--series", default="10000,100000,1000000")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--quick", action="store_true", help="20k vs 100k, series 10k,100k")
    args = parser.parse_args()
    if args.quick:
        args.candidates, args.training, args.baseline_queries = 20_000, 100_000, 1_000
        args.series = "10000,100000"
    series = sorted({int(s) for s in args.series.split(",") if s} | {args.training})
    series = [n for n in series if n <= args.training]

    rng = np.random.default_rng(args.seed)
    t0 = time.perf_counter()
    training = clustered_states(rng, args.training)
    candidates = clustered_states(rng, args.candidates, shifted_fraction=0.1)
    sub = np.sort(rng.choice(args.candidates, size=args.baseline_queries, replace=False))
    print(
        f"data: {args.candidates:,d} candidates x {args.training:,d} training states, "
        f"{N_FEATURES} float32 features, k={K}, clustered (generated in "
        f"{time.perf_counter() - t0:.1f} s)"
    )
    print(
        f"exact baselines run on {sub.size:,d} sampled candidates and are scaled linearly "
        f"x{args.candidates / sub.size:.0f} to {args.candidates:,d}; quality measured on them"
    )

    rows = []
    for n in series:
        row = run_size(training[:n], candidates, sub, args.seed, nv.DEFAULT_EXACT_THRESHOLD)
        rows.append(row)
        print_row(row)

    main_row = rows[-1]
    print(f"\nmain case: {args.candidates:,d} candidates vs {args.training:,d} training states")
    print(f"  our novelty ({main_row.path}): {main_row.ours_s:.2f} s")
    print(
        f"  speed vs sklearn exact brute: x{main_row.sklearn_s / main_row.ours_s:.1f} "
        "(target >= 10)"
    )
    print(f"  speed vs numpy exact float64: x{main_row.numpy_s / main_row.ours_s:.1f}")
    print(f"  recall@10: {main_row.recall:.4f}")
    print(f"  top-1% overlap: {main_row.overlap:.3f} (target >= 0.90)")
    print(f"  Spearman: {main_row.spearman:.4f} (target >= 0.98)")

    # Build cost matters as the training set grows
    # (docs/references.md, "Approximate nearest-neighbour search").
    standardised = nv.Standardiser.fit(training).transform(training, np.float32)
    t0 = time.perf_counter()
    nv.build_ivf_index(standardised, rng=np.random.default_rng(args.seed))
    print(f"  IVF build alone at {args.training:,d}: {time.perf_counter() - t0:.2f} s")
    del standardised

    # Selection over the same round: budget 2% of candidates, a 5-step gap, 10% audit.
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
    print(
        f"  peak memory (ru_maxrss): {main_row.memory_after_ours_gb:.2f} GB after our main run; "
        f"{peak_memory_gb():.2f} GB at the end, baselines included (target < 2 GB)"
    )


if __name__ == "__main__":
    main()
