"""Strata of a round's candidates: k-means cells in standardised feature space.

The ranked part of a selection shares its picks among the cells in proportion to each cell's
total score (:func:`stratified_order`), so the picks follow where the learner spent its time and
where its errors are likely, instead of piling into the one corner of the round where the score
is highest (the learner's errors sit where it spends its time, and DAgger's error bound is taken
over those states). A stretch the learner lingered in gets several picks, a few outlying states
one.

Pure functions over numpy arrays. The cells are scipy's k-means (`scipy.cluster.vq.kmeans2`
with k-means++ seeding, then Lloyd's iterations); see docs/references.md, "k-means strata".
"""

from __future__ import annotations

import warnings

import numpy as np
from numpy.typing import ArrayLike, NDArray

IntArray = NDArray[np.int64]

MAX_STRATA = 256
"""More cells than this cost more (rows x cells x features per iteration) than they spread: a
larger budget takes several states a cell, best-scored first."""
FIT_ROWS_PER_STRATUM = 50
"""The cells are fitted on a seeded sample of at most this many candidates per cell, then every
candidate goes to its nearest centre."""
LLOYD_ITERATIONS = 20


def strata(points: ArrayLike, n_strata: int, rng: np.random.Generator) -> IntArray:
    """Cell of each point among at most ``n_strata`` k-means cells.

    Parameters
    ----------
    points : array_like of shape (n, d)
        Standardised features, in a canonical order (the result depends on the order only
        through the seeded sample).
    n_strata : int
        Wanted cells; capped at :data:`MAX_STRATA` and at the number of distinct points.
    rng : numpy.random.Generator
        Draws the fitting sample and the seeding.

    Returns
    -------
    ndarray of shape (n,)
        Cell numbers in [0, cells).
    """
    p = np.asarray(points, dtype=np.float64)
    n = p.shape[0]
    if n == 0 or n_strata <= 1:
        return np.zeros(n, dtype=np.int64)
    k = min(n_strata, MAX_STRATA, n)
    n_fit = min(n, FIT_ROWS_PER_STRATUM * k)
    sample = p[np.sort(rng.choice(n, size=n_fit, replace=False))] if n_fit < n else p
    k = min(k, np.unique(sample, axis=0).shape[0])
    if k <= 1:
        return np.zeros(n, dtype=np.int64)
    # imported here, like scipy in scores.py: at module level it costs every server some 30 MB
    from scipy.cluster.vq import kmeans2, vq

    with warnings.catch_warnings():
        # a cell that ends empty keeps its centre and simply takes no candidates
        warnings.filterwarnings("ignore", "One of the clusters is empty", UserWarning)
        centres, _ = kmeans2(sample, k, iter=LLOYD_ITERATIONS, minit="++", rng=rng)
    cells, _ = vq(p, centres, check_finite=False)
    return cells.astype(np.int64)


def stratified_order(scores: ArrayLike, cells: ArrayLike) -> IntArray:
    """Positions in the order the ranked part takes them: cells share the picks in proportion
    to their total score, each cell's best-scored states first.

    The j-th best state of cell c (j = 0, 1, ...) gets the quotient ``W_c / (2 j + 1)``, where
    ``W_c`` is the sum of the cell's scores, and states are taken by descending quotient (ties by
    score, then position). This is the Sainte-Lague (Webster) highest-averages rule, so every
    prefix of the order splits its length between the cells as that rule apportions seats to
    votes: in proportion to ``W_c``. With scores that are probabilities of disagreement, ``W_c``
    is the cell's expected number of disagreements; with percentiles, its size times its mean.

    Parameters
    ----------
    scores : array_like of shape (n,)
        Non-negative.
    cells : array_like of shape (n,)

    Returns
    -------
    ndarray of shape (n,)
    """
    s = np.asarray(scores, dtype=np.float64)
    c = np.asarray(cells, dtype=np.int64)
    if s.shape != c.shape or s.ndim != 1:
        raise ValueError("scores and cells must be 1-d arrays of the same length")
    if np.any(s < 0):
        raise ValueError("stratified selection needs non-negative scores")
    position = np.arange(s.size)
    by_cell = np.lexsort((position, -s, c))
    starts = np.searchsorted(c[by_cell], c[by_cell], side="left")
    tier = np.empty(s.size, dtype=np.int64)
    tier[by_cell] = np.arange(s.size) - starts
    _, dense = np.unique(c, return_inverse=True)
    totals = np.bincount(dense.ravel(), weights=s)
    quotient = totals[dense.ravel()] / (2.0 * tier + 1.0)
    return np.lexsort((position, -s, -quotient)).astype(np.int64)
