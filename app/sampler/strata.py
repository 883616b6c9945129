"""Strata of a round's candidates: k-means cells in standardised feature space.

The ranked part of a selection shares its picks among the cells in proportion to each cell's
total score (:func:`stratified_order`), so the picks follow where the learner spent its time and
where its errors are likely, instead of piling into the one corner of the round where the score
is highest (the learner's errors sit where it spends its time, and DAgger's error bound is taken
over those states). A stretch the learner lingered in gets several picks, a few outlying states
one.

Pure functions over numpy arrays. Seeding is k-means++ (D. Arthur and S. Vassilvitskii, 2007,
*k-means++: the advantages of careful seeding*), then Lloyd's iterations; see
docs/references.md, "k-means strata".
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

MAX_STRATA = 256
"""More cells than this cost more (rows x cells x features per iteration) than they spread: a
larger budget takes several states a cell, best-scored first."""
FIT_ROWS_PER_STRATUM = 50
"""The cells are fitted on a seeded sample of at most this many candidates per cell, then every
candidate goes to its nearest centre."""
LLOYD_ITERATIONS = 20
_ASSIGN_CHUNK = 8192


def _sq_distances(points: FloatArray, centres: FloatArray) -> FloatArray:
    """Squared distances (n, k), by the expansion (points are standardised, hence centred)."""
    d2 = (
        np.einsum("ij,ij->i", points, points)[:, None]
        - 2.0 * points @ centres.T
        + np.einsum("ij,ij->i", centres, centres)[None, :]
    )
    return np.maximum(d2, 0.0)


def nearest_centre(points: ArrayLike, centres: ArrayLike) -> IntArray:
    """Index of the nearest centre of each point (ties to the smaller index).

    Parameters
    ----------
    points : array_like of shape (n, d)
    centres : array_like of shape (k, d)

    Returns
    -------
    ndarray of shape (n,)
    """
    p = np.asarray(points, dtype=np.float64)
    c = np.asarray(centres, dtype=np.float64)
    out = np.empty(p.shape[0], dtype=np.int64)
    for start in range(0, p.shape[0], _ASSIGN_CHUNK):
        out[start : start + _ASSIGN_CHUNK] = _sq_distances(
            p[start : start + _ASSIGN_CHUNK], c
        ).argmin(axis=1)
    return out


def kmeans_plus_plus(points: ArrayLike, k: int, rng: np.random.Generator) -> FloatArray:
    """k-means++ seeding: the first centre uniformly, each next one with probability
    proportional to the squared distance to the nearest centre chosen so far.

    Parameters
    ----------
    points : array_like of shape (n, d)
    k : int
        1 <= k <= number of distinct points.
    rng : numpy.random.Generator

    Returns
    -------
    ndarray of shape (k, d)
    """
    p = np.asarray(points, dtype=np.float64)
    centres = np.empty((k, p.shape[1]))
    centres[0] = p[rng.integers(p.shape[0])]
    nearest = _sq_distances(p, centres[:1])[:, 0]
    for i in range(1, k):
        total = nearest.sum()
        centres[i] = p[rng.choice(p.shape[0], p=nearest / total)]
        np.minimum(nearest, _sq_distances(p, centres[i : i + 1])[:, 0], out=nearest)
    return centres


def lloyd(points: ArrayLike, centres: ArrayLike, iterations: int = LLOYD_ITERATIONS) -> FloatArray:
    """Lloyd's iterations from the given centres: assign, move each centre to its cell's mean.

    A cell left empty keeps its centre. Stops early when no assignment changes.

    Returns
    -------
    ndarray of shape (k, d)
        The final centres.
    """
    p = np.asarray(points, dtype=np.float64)
    c = np.array(centres, dtype=np.float64)
    labels = None
    for _ in range(iterations):
        new = nearest_centre(p, c)
        if labels is not None and np.array_equal(new, labels):
            break
        labels = new
        counts = np.bincount(labels, minlength=c.shape[0])
        sums = np.zeros_like(c)
        np.add.at(sums, labels, p)
        filled = counts > 0
        c[filled] = sums[filled] / counts[filled, None]
    return c


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
    centres = lloyd(sample, kmeans_plus_plus(sample, k, rng))
    return nearest_centre(p, centres)


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
