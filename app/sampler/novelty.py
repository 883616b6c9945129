"""Novelty: distance from candidate states to the training set in standardised feature space.

Exact search (chunked numpy, float64) for small training sets; an approximate faiss IVF-Flat
index above a size threshold. We measured IVF (nlist about sqrt(N), nprobe 16) at recall@10
0.997 with sub-second builds at 100k, while HNSW needed minutes to build
(docs/references.md, "Approximate nearest-neighbour search"); bench/rank.py measures recall
and speed on our side. We use twice as many lists (2 sqrt(N)): at 1M training states and 200k
queries the search took 24 s instead of 38 s with the same recall@10 (0.9996); 4 sqrt(N) lost
recall and spent the saving on k-means.

Which search runs is a function of the sizes alone (:func:`exact_search_fits`), so a rerun
takes the same path. How many threads it runs on is chosen for the cores other work leaves
free (app/sampler/cores.py) and does not change the result.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from . import cores

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]
Progress = Callable[[float], None]
Pace = Callable[[], None]
"""Called before each chunk of work: sets the thread count for it (see :func:`_paced`)."""

# Exact search costs about 7 ns of one core per (candidate, training state) pair at 64
# features, and building the index about 9 us per training state, both in proportion to the
# training states: exact search is the faster below about 1,000 candidates whatever the
# training set. Timing both paths on one core from 2k to 100k training states and 500 to 50k
# candidates, this rule chose the faster at every size but one (2k states and 500 candidates:
# exact 0.04 s, index 0.01 s). Above 100k training states exact search is not offered: its
# float64 copy of the training set would grow past 50 MB.
EXACT_MAX_CANDIDATES = 1_000
EXACT_MAX_TRAINING = 100_000
# Up to this many pairs exact search takes at most about a third of a second of one core, so it
# is kept even where the index would be faster: a ranking job spends seconds around its search,
# the index would save a fraction of a second, and its answers are approximate (a small round's
# novelty would depend on the index's k-means). Rounds of a few thousand states against a few
# thousand training states, a young loop's, stay exact as they were before the rule above.
EXACT_ALWAYS_PAIRS = 50_000_000
DEFAULT_NPROBE = 16
LISTS_PER_SQRT_N = 2  # inverted lists per sqrt(training states); see the module docstring
# Bytes for one tile of the query-by-reference distance matrix: bounds exact-search memory
# whatever the training set size.
_BLOCK_BYTES = 64 * 2**20
# faiss k-means wants at least 39 points per centroid; 64 per centroid is plenty for recall
# and keeps training time small at 1M states.
_TRAIN_POINTS_PER_LIST = 64
_TRANSFORM_CHUNK = 65_536
# Approximate search: vectors per faiss add or search call, so progress (and with it the ranking
# job's lease) is reported every few seconds even at millions of states.
_FAISS_CHUNK = 65_536
# Exact search: reference rows per block, and groups per neighbour sought (_block_top_k).
_REFERENCE_BLOCK = 32_768
_GROUPS_PER_NEIGHBOUR = 64


@dataclass(frozen=True)
class Standardiser:
    """Per-feature centring and scaling fitted on the training features.

    Attributes
    ----------
    mean : ndarray of shape (n_features,)
    scale : ndarray of shape (n_features,)
        Standard deviation (ddof=0); features with zero spread get 1 so they pass unscaled.
    """

    mean: FloatArray
    scale: FloatArray

    @classmethod
    def fit(cls, training: ArrayLike) -> Standardiser:
        """Fit on training features of shape (n_training, n_features)."""
        x = _as_features(training, "training")
        if x.shape[0] == 0:
            raise ValueError("Standardiser: cannot fit on an empty training set")
        mean = np.zeros(x.shape[1])
        sq = np.zeros(x.shape[1])
        # Two passes in float64 chunks: exact enough for offsets like 1000 + 0.01 x, and
        # never holds a float64 copy of a million-row float32 array.
        for start in range(0, x.shape[0], _TRANSFORM_CHUNK):
            mean += x[start : start + _TRANSFORM_CHUNK].sum(axis=0, dtype=np.float64)
        mean /= x.shape[0]
        for start in range(0, x.shape[0], _TRANSFORM_CHUNK):
            d = x[start : start + _TRANSFORM_CHUNK].astype(np.float64) - mean
            sq += np.einsum("ij,ij->j", d, d)
        std = np.sqrt(sq / x.shape[0])
        scale = np.where(std > 0, std, 1.0)
        return cls(mean=mean, scale=scale)

    def transform(self, features: ArrayLike, dtype: type = np.float64) -> NDArray[Any]:
        """Standardise features of shape (n, n_features); arithmetic in float64."""
        x = _as_features(features, "features")
        if x.shape[1] != self.mean.shape[0]:
            raise ValueError(f"features: expected {self.mean.shape[0]} features, got {x.shape[1]}")
        out: NDArray[Any] = np.empty(x.shape, dtype=dtype)
        for start in range(0, x.shape[0], _TRANSFORM_CHUNK):
            block = x[start : start + _TRANSFORM_CHUNK].astype(np.float64)
            out[start : start + _TRANSFORM_CHUNK] = (block - self.mean) / self.scale
        return out


def _as_features(x: ArrayLike, name: str) -> NDArray[Any]:
    a = np.asarray(x)
    if a.ndim != 2:
        raise ValueError(f"{name}: expected shape (n, n_features), got {a.shape}")
    if not np.issubdtype(a.dtype, np.floating):
        a = a.astype(np.float64)
    if not np.all(np.isfinite(a)):
        raise ValueError(f"{name}: contains NaN or infinite values")
    return a


def _block_top_k(d2: FloatArray, k: int, n_groups: int) -> tuple[FloatArray, IntArray]:
    """Smallest k values per row of d2 (ascending, ties by column) and their columns.

    A full argpartition costs about 30 ns per element. Instead the columns are split into
    ``n_groups`` strided groups (column j is in group ``j % n_groups``); the k-th smallest group
    minimum bounds the k-th smallest value from above (k groups each hold a value at or below
    it), so only the groups whose minimum is under that bound, typically k per row, are
    searched. ``d2.shape[1]`` must be a multiple of ``n_groups``.
    """
    nb = d2.shape[0]
    strided = d2.reshape(nb, -1, n_groups)
    # Reducing over the middle axis is an elementwise minimum of contiguous rows (fast).
    group_min = strided.min(axis=1)
    bound = np.partition(group_min, k - 1, axis=1)[:, k - 1]
    row, group = np.nonzero(group_min <= bound[:, None])
    group_size = strided.shape[1]
    val = strided[row, :, group]  # (n_pairs, group_size)
    col = np.arange(group_size)[None, :] * n_groups + group[:, None]
    if row.size == nb * k:
        # Usual case, exactly k groups per row: sort each row by column, then stably by value,
        # which orders by value with ties by column.
        val, col = val.reshape(nb, -1), col.reshape(nb, -1)
        by_col = np.argsort(col, axis=1)
        val = np.take_along_axis(val, by_col, axis=1)
        col = np.take_along_axis(col, by_col, axis=1)
        by_val = np.argsort(val, axis=1, kind="stable")[:, :k]
        return np.take_along_axis(val, by_val, axis=1), np.take_along_axis(col, by_val, axis=1)
    # Ties at the bound put more than k groups in some rows: one lexsort over all pairs.
    row = np.broadcast_to(row[:, None], val.shape).ravel()
    val, col = val.ravel(), col.ravel()
    order = np.lexsort((col, val, row))  # by row, then value, ties by column
    row_start = np.searchsorted(row[order], np.arange(nb))
    take = order[row_start[:, None] + np.arange(k)]
    return val[take], col[take]


def exact_knn_distances(
    queries: ArrayLike,
    reference: ArrayLike,
    k: int,
    chunk: int | None = None,
    progress: Progress | None = None,
) -> tuple[FloatArray, IntArray]:
    """Exact k nearest reference points for each query (Euclidean), chunked numpy.

    Both sets are centred on the reference mean and converted to float64 before the
    expansion ``|q|^2 + |r|^2 - 2 q.r``: in float32 without centring, offsets such as
    ``0.01 x + 1000`` cancel catastrophically (docs/references.md, "kNN novelty"). Squared
    distances are clamped at 0 before the square root. Work is tiled over query chunks and
    reference blocks of at most 32768 rows, so memory stays bounded (about 64 MiB per tile by
    default) whatever the sizes. Tied distances go to the smaller reference index.

    Parameters
    ----------
    queries : array_like of shape (n_queries, n_features)
    reference : array_like of shape (n_reference, n_features)
    k : int
        Neighbours per query, 1 <= k <= n_reference.
    chunk : int, optional
        Queries per tile. Default: as many as keep one tile of the distance matrix within
        64 MiB (at least 1).
    progress : callable, optional
        Called with the fraction of queries done after each chunk of queries.

    Returns
    -------
    distances : ndarray of shape (n_queries, k)
        Ascending along each row.
    indices : ndarray of shape (n_queries, k)
        Row indices into ``reference``.
    """
    q = _as_features(queries, "queries")
    r = _as_features(reference, "reference")
    if q.shape[1] != r.shape[1]:
        raise ValueError(f"queries have {q.shape[1]} features, reference {r.shape[1]}")
    n_ref = r.shape[0]
    if not 1 <= k <= n_ref:
        raise ValueError(f"k must be between 1 and {n_ref} (reference size), got {k}")

    # Every block gets the same padded width block_rows = n_groups * group_size; padding rows
    # have |r|^2 = inf so they are never among the k nearest (k <= n_ref).
    block_rows = min(n_ref, _REFERENCE_BLOCK)
    n_groups = min(block_rows, _GROUPS_PER_NEIGHBOUR * k)
    group_size = -(-block_rows // n_groups)
    block_rows = n_groups * group_size
    n_blocks = -(-n_ref // block_rows)
    if chunk is None:
        chunk = max(1, _BLOCK_BYTES // (8 * block_rows))
    if chunk < 1:
        raise ValueError(f"chunk must be >= 1, got {chunk}")

    centre = r.mean(axis=0, dtype=np.float64)
    r64 = np.zeros((n_blocks * block_rows, r.shape[1]))
    r64[:n_ref] = r
    r64[:n_ref] -= centre
    r_sq = np.full(n_blocks * block_rows, np.inf)
    r_sq[:n_ref] = np.einsum("ij,ij->i", r64[:n_ref], r64[:n_ref])
    r64 *= -2.0  # so that one matrix product gives -2 q.r

    k_block = min(k, block_rows)
    distances = np.empty((q.shape[0], k))
    indices = np.empty((q.shape[0], k), dtype=np.int64)
    # One reused tile buffer: allocating a fresh 64 MiB array per tile costs more in page
    # faults than the matrix product itself.
    tile = np.empty((min(chunk, q.shape[0]), block_rows))
    for start in range(0, q.shape[0], chunk):
        qb = q[start : start + chunk].astype(np.float64) - centre
        nb = qb.shape[0]
        best_val = np.empty((nb, n_blocks * k_block))
        best_col = np.empty((nb, n_blocks * k_block), dtype=np.int64)
        for block in range(n_blocks):
            lo = block * block_rows
            # |r|^2 - 2 q.r ranks like the squared distance: |q|^2 is constant along a row.
            d2 = tile[:nb]
            np.matmul(qb, r64[lo : lo + block_rows].T, out=d2)
            d2 += r_sq[lo : lo + block_rows]
            val, col = _block_top_k(d2, k_block, n_groups)
            best_val[:, block * k_block : (block + 1) * k_block] = val
            best_col[:, block * k_block : (block + 1) * k_block] = col + lo
        if n_blocks > 1:
            # Blocks are in index order and each is sorted by (value, index), so a stable
            # sort on the value keeps ties by index.
            order = np.argsort(best_val, axis=1, kind="stable")[:, :k]
            best_val = np.take_along_axis(best_val, order, axis=1)
            best_col = np.take_along_axis(best_col, order, axis=1)
        q_sq = np.einsum("ij,ij->i", qb, qb)
        distances[start : start + nb] = np.sqrt(np.maximum(best_val + q_sq[:, None], 0.0))
        indices[start : start + nb] = best_col
        if progress is not None:
            progress((start + nb) / q.shape[0])
    return distances, indices


def _float32(rows: NDArray[Any], standardiser: Standardiser | None) -> NDArray[np.float32]:
    """Rows as contiguous float32, standardised first when a standardiser is given."""
    if standardiser is not None:
        return np.ascontiguousarray(standardiser.transform(rows, np.float32))
    return np.ascontiguousarray(rows, dtype=np.float32)


def build_ivf_index(
    reference: ArrayLike,
    *,
    rng: np.random.Generator,
    nlist: int | None = None,
    nprobe: int = DEFAULT_NPROBE,
    progress: Progress | None = None,
    standardiser: Standardiser | None = None,
    pace: Pace | None = None,
) -> Any:
    """Build a faiss IVF-Flat index (exact distances within the probed lists).

    Parameters
    ----------
    reference : array_like of shape (n_reference, n_features)
        Standardised (hence centred) already, or standardised here by ``standardiser``
        chunk by chunk, so no standardised copy of the whole set is made; stored as float32.
    rng : numpy.random.Generator
        Chooses the k-means training subsample and seeds faiss k-means.
    nlist : int, optional
        Number of inverted lists; default ``round(LISTS_PER_SQRT_N * sqrt(n_reference))``.
    nprobe : int
        Lists searched per query.
    progress : callable, optional
        Called with the fraction of reference vectors added, after each chunk.
    standardiser : Standardiser, optional
        Applied to the reference rows before they are stored.
    pace : callable, optional
        Called before training and before each chunk added (sets the thread count).

    Returns
    -------
    faiss.IndexIVFFlat
        Trained and filled. The service may keep it and ``add`` new training states.
    """
    faiss = cores.load_faiss()  # imported here: only the approximate path needs it

    r = _as_features(reference, "reference")
    n_ref, dim = r.shape
    if n_ref == 0:
        raise ValueError("reference: cannot build an index on an empty set")
    if nlist is None:
        nlist = max(1, int(round(LISTS_PER_SQRT_N * np.sqrt(n_ref))))
    nlist = min(nlist, n_ref)
    n_train = min(n_ref, _TRAIN_POINTS_PER_LIST * nlist)
    rows = np.sort(rng.choice(n_ref, size=n_train, replace=False))
    # Gathered a chunk at a time: a copy of the sampled raw rows would add its own size again.
    sample = np.empty((n_train, dim), dtype=np.float32)
    for start in range(0, n_train, _TRANSFORM_CHUNK):
        chunk_rows = rows[start : start + _TRANSFORM_CHUNK]
        sample[start : start + chunk_rows.size] = _float32(r[chunk_rows], standardiser)
    quantiser = faiss.IndexFlatL2(dim)
    index = faiss.IndexIVFFlat(quantiser, dim, nlist, faiss.METRIC_L2)
    index.cp.seed = int(rng.integers(0, 2**31 - 1))
    # Silence faiss's "fewer than 39 points per centroid" warning for tiny sets.
    index.cp.min_points_per_centroid = 1
    if pace is not None:
        pace()
    index.train(sample)
    del sample
    for start in range(0, n_ref, _FAISS_CHUNK):
        if pace is not None:
            pace()
        index.add(_float32(r[start : start + _FAISS_CHUNK], standardiser))
        if progress is not None:
            progress(min(start + _FAISS_CHUNK, n_ref) / n_ref)
    index.nprobe = min(nprobe, nlist)
    return index


def _search_chunk(index: Any, q: NDArray[np.float32], k: int) -> tuple[FloatArray, IntArray]:
    """k nearest neighbours of the queries ``q`` in the index: distances and indices.

    The queries are searched in the order of their nearest list, so consecutive queries
    probe mostly the same lists while those are still in the cache: at 1M training states this
    took 4.0 s of CPU per 50k queries against 7.4 s in the given order, with the same answers
    (each query's answer does not depend on the others). A query whose probed lists hold fewer
    than k points is searched again in every list, which is exact.
    """
    faiss = cores.load_faiss()
    centroid_d2, lists = index.quantizer.search(q, index.nprobe)
    order = np.argsort(lists[:, 0], kind="stable")
    d2_sorted, idx_sorted = index.search_preassigned(q[order], k, lists[order], centroid_d2[order])
    d2 = np.empty_like(d2_sorted)
    idx = np.empty_like(idx_sorted)
    d2[order], idx[order] = d2_sorted, idx_sorted
    short = np.flatnonzero((idx < 0).any(axis=1))
    if short.size:
        every_list = faiss.SearchParametersIVF(nprobe=index.nlist)
        d2[short], idx[short] = index.search(q[short], k, params=every_list)
    distances = np.sqrt(np.maximum(d2.astype(np.float64), 0.0))
    return distances, idx.astype(np.int64)


def _ivf_chunks(
    queries: NDArray[Any],
    reference: NDArray[Any],
    k: int,
    *,
    rng: np.random.Generator,
    nlist: int | None,
    nprobe: int,
    progress: Progress | None,
    standardiser: Standardiser | None,
    pace: Pace | None,
) -> Iterator[tuple[int, FloatArray, IntArray]]:
    """Build the index, then yield (first query row, distances, indices) chunk by chunk."""
    report = progress if progress is not None else (lambda _: None)
    index = build_ivf_index(
        reference,
        rng=rng,
        nlist=nlist,
        nprobe=nprobe,
        progress=lambda f: report(f / 3),
        standardiser=standardiser,
        pace=pace,
    )
    n = queries.shape[0]
    for start in range(0, n, _FAISS_CHUNK):
        if pace is not None:
            pace()
        q = _float32(queries[start : start + _FAISS_CHUNK], standardiser)
        distances, indices = _search_chunk(index, q, k)
        yield start, distances, indices
        report(1 / 3 + 2 / 3 * min(start + _FAISS_CHUNK, n) / n)


def approximate_knn_distances(
    queries: ArrayLike,
    reference: ArrayLike,
    k: int,
    *,
    rng: np.random.Generator,
    nlist: int | None = None,
    nprobe: int = DEFAULT_NPROBE,
    progress: Progress | None = None,
    standardiser: Standardiser | None = None,
    pace: Pace | None = None,
) -> tuple[FloatArray, IntArray]:
    """Approximate k nearest reference points with a faiss IVF-Flat index.

    Inputs should be standardised (centred) so float32 loses nothing that matters, or be
    standardised here by ``standardiser``. Queries whose probed lists hold fewer than k points
    are searched in every list instead, which is exact.

    Parameters
    ----------
    queries : array_like of shape (n_queries, n_features)
    reference : array_like of shape (n_reference, n_features)
    k : int
        1 <= k <= n_reference.
    rng : numpy.random.Generator
        See :func:`build_ivf_index`.
    nlist, nprobe : int
        See :func:`build_ivf_index`.
    progress : callable, optional
        Called with the fraction done: building the index counts as the first third.
    standardiser : Standardiser, optional
        Applied to both sets, a chunk at a time.
    pace : callable, optional
        Called before each chunk of work (sets the thread count).

    Returns
    -------
    distances : ndarray of shape (n_queries, k)
    indices : ndarray of shape (n_queries, k)
    """
    q = _as_features(queries, "queries")
    r = _as_features(reference, "reference")
    if not 1 <= k <= r.shape[0]:
        raise ValueError(f"k must be between 1 and {r.shape[0]} (reference size), got {k}")
    distances = np.empty((q.shape[0], k))
    indices = np.empty((q.shape[0], k), dtype=np.int64)
    chunks = _ivf_chunks(
        q,
        r,
        k,
        rng=rng,
        nlist=nlist,
        nprobe=nprobe,
        progress=progress,
        standardiser=standardiser,
        pace=pace,
    )
    for start, dist, idx in chunks:
        distances[start : start + len(dist)] = dist
        indices[start : start + len(idx)] = idx
    return distances, indices


def exact_search_fits(n_candidates: int, n_training: int) -> bool:
    """Whether novelty searches exactly (True) or with the IVF index (False), by sizes alone.

    See ``EXACT_MAX_CANDIDATES`` for the measurements behind the rule, and
    ``EXACT_ALWAYS_PAIRS`` for the small searches kept exact whatever their shape.
    """
    if n_training > EXACT_MAX_TRAINING:
        return False
    return n_candidates <= EXACT_MAX_CANDIDATES or n_candidates * n_training <= EXACT_ALWAYS_PAIRS


def _part(progress: Progress | None, start: int, size: int, total: int) -> Progress | None:
    """Progress of rows ``start`` to ``start + size`` reported as a fraction of ``total``."""
    if progress is None:
        return None
    report = progress
    return lambda f: report((start + f * size) / total)


def legacy_exact_search_fits(n_candidates: int, n_training: int) -> bool:
    """The choice before ``exact_search_fits`` was measured: exact search up to 2e8 pairs and
    50k training states. Ranking jobs recorded before it rerun with it (RankParams)."""
    return n_training <= 50_000 and float(n_candidates) * n_training <= 2e8


@contextmanager
def _paced(work_pairs: float) -> Iterator[Pace | None]:
    """A ``pace`` that runs each chunk on the threads the free cores allow, then restores.

    Work under ``EXACT_MAX_CANDIDATES`` x ``EXACT_MAX_TRAINING`` pairs at most (a fraction of
    a second) runs as the libraries would run it: measuring the cores would cost more.
    """
    if work_pairs <= EXACT_MAX_CANDIDATES * EXACT_MAX_TRAINING:
        yield None
        return
    meter = cores.start_meter()
    limit = cores.ThreadLimit()
    try:
        yield lambda: limit.set(meter.threads())
    finally:
        limit.restore()


def novelty(
    candidates: ArrayLike,
    training: ArrayLike,
    k: int = 10,
    exact_threshold: int | None = None,
    rng: np.random.Generator | None = None,
    progress: Progress | None = None,
) -> FloatArray:
    """Mean distance from each candidate to its k nearest training states.

    Distances are taken in feature space standardised on the training set, so the score does
    not depend on feature units. Candidates are standardised and searched a chunk at a time,
    and the index holds the only standardised copy of the training set, so memory beyond the
    inputs stays near the index's size (about the training set's in float32).

    Parameters
    ----------
    candidates : array_like of shape (n_candidates, n_features)
    training : array_like of shape (n_training, n_features)
        Must not be empty: novelty against nothing is undefined.
    k : int
        Neighbours; reduced to ``n_training`` when larger.
    exact_threshold : int, optional
        Training sets larger than this use the approximate IVF index. Default: the choice of
        :func:`exact_search_fits`.
    rng : numpy.random.Generator, optional
        Seeds the approximate index; default ``numpy.random.default_rng(0)`` so results are
        reproducible. Unused on the exact path.
    progress : callable, optional
        Called with the fraction of the search done, every few seconds at most: a long search
        keeps reporting (a background job renews its lease on progress).

    Returns
    -------
    ndarray of shape (n_candidates,)
    """
    if k < 1:
        raise ValueError(f"k must be >= 1, got {k}")
    train = _as_features(training, "training")
    if train.shape[0] == 0:
        raise ValueError(
            "novelty is undefined against an empty training set; "
            "add seed demonstrations first or rank by uncertainty only"
        )
    cand = _as_features(candidates, "candidates")
    if cand.shape[1] != train.shape[1]:
        raise ValueError(f"candidates have {cand.shape[1]} features, training {train.shape[1]}")
    n_cand, n_train = cand.shape[0], train.shape[0]
    k = min(k, n_train)
    if exact_threshold is None:
        exact = exact_search_fits(n_cand, n_train)
    else:
        exact = n_train <= exact_threshold
    if not exact:
        cores.load_faiss()  # before the thread limit, which limits the pools loaded
    standardiser = Standardiser.fit(train)
    out = np.empty(n_cand)
    if exact:
        # On one BLAS thread: a matrix product split over two threads summed some distances in
        # another order and differed in the last bit, so a rerun on other free cores could rank
        # differently. Exact search is kept for work of at most about a second on one core.
        with cores.limited_threads(1):
            reference = standardiser.transform(train)
            for start in range(0, n_cand, _TRANSFORM_CHUNK):
                block = standardiser.transform(cand[start : start + _TRANSFORM_CHUNK])
                dist, _ = exact_knn_distances(
                    block, reference, k, progress=_part(progress, start, len(block), n_cand)
                )
                out[start : start + len(block)] = dist.mean(axis=1)
        return out
    with _paced(float(n_cand) * n_train) as pace:
        chunks = _ivf_chunks(
            cand,
            train,
            k,
            rng=rng if rng is not None else np.random.default_rng(0),
            nlist=None,
            nprobe=DEFAULT_NPROBE,
            progress=progress,
            standardiser=standardiser,
            pace=pace,
        )
        for start, dist, _ in chunks:
            out[start : start + len(dist)] = dist.mean(axis=1)
    return out
