"""Shift between the states a round visited and the training set: kernel MMD with a
permutation test, and per-feature standardised mean differences.

Pure functions over numpy arrays, with the conventions stated in app.reports.rates.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike

from .rates import FloatArray


def _squared_distances(a: FloatArray, b: FloatArray) -> FloatArray:
    # Expansion |a|^2 + |b|^2 - 2ab in float64; callers centre the data first because the
    # expansion cancels badly far from the origin (docs/references.md, "kNN novelty").
    d2 = (a * a).sum(1)[:, None] + (b * b).sum(1)[None, :] - 2.0 * (a @ b.T)
    return np.maximum(d2, 0.0)


def _check_pair(X: ArrayLike, Y: ArrayLike, minimum: int) -> tuple[FloatArray, FloatArray]:
    x, y = np.asarray(X, np.float64), np.asarray(Y, np.float64)
    if x.ndim != 2 or y.ndim != 2 or x.shape[1] != y.shape[1]:
        raise ValueError(f"X and Y must be 2-D with equal feature count, got {x.shape}, {y.shape}")
    if len(x) < minimum or len(y) < minimum:
        raise ValueError(f"X and Y need at least {minimum} rows each, got {len(x)}, {len(y)}")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise ValueError("X and Y must be finite")
    return x, y


def _centre(x: FloatArray, y: FloatArray) -> tuple[FloatArray, FloatArray]:
    # Distances do not change under a shift, and centring keeps the expansion accurate.
    centre = (x.sum(axis=0) + y.sum(axis=0)) / (len(x) + len(y))
    return x - centre, y - centre


def _as_samples(X: ArrayLike, Y: ArrayLike, minimum: int) -> tuple[FloatArray, FloatArray]:
    return _centre(*_check_pair(X, Y, minimum))


def _rbf(d2: FloatArray, bandwidth: float) -> FloatArray:
    if not bandwidth > 0:
        raise ValueError(f"bandwidth must be > 0, got {bandwidth}")
    return np.exp(-d2 / (2.0 * bandwidth * bandwidth))


def median_heuristic(Z: ArrayLike) -> float:
    """Kernel bandwidth: median Euclidean distance over distinct pairs of the pooled sample.

    The convention is ``median(scipy.spatial.distance.pdist(Z))``: each unordered pair i < j
    once, the zero self-distances left out (so [0, 1, 2, 3] gives 1.5). If more than half the
    pairs coincide the median is 0, so the median of the positive distances is used instead.

    Parameters
    ----------
    Z : array-like of shape (n_samples, n_features), n_samples >= 2
        Pass the pooled sample (both X and Y). Memory is O(n_samples^2).

    Raises
    ------
    ValueError
        If all points coincide (no scale to take).
    """
    z, _ = _as_samples(Z, Z, minimum=2)
    rows, cols = np.triu_indices(len(z), k=1)
    distances = np.sqrt(_squared_distances(z, z)[rows, cols])
    bandwidth = float(np.median(distances))
    if bandwidth == 0.0:
        positive = distances[distances > 0]
        if positive.size == 0:
            raise ValueError("all points coincide; the median heuristic has no scale")
        bandwidth = float(np.median(positive))
    return bandwidth


class MMDTest(NamedTuple):
    """Result of :func:`mmd_permutation_test`."""

    mmd2: float
    bandwidth: float
    p_value: float


def _permuted_mmd2(
    kernel: FloatArray, row_sums: FloatArray, assignments: FloatArray, m: int
) -> FloatArray:
    # With a the 0/1 indicator of the X rows, q = a'Ka and t = a'K1 give every block sum of the
    # pooled kernel, so each permutation costs one matrix-vector product.
    n = kernel.shape[0] - m
    total = row_sums.sum()
    q = np.einsum("pi,pi->p", assignments @ kernel, assignments)
    t = assignments @ row_sums
    within_x = (q - m) / (m * (m - 1))
    within_y = (total - 2.0 * t + q - n) / (n * (n - 1))
    between = (t - q) / (m * n)
    result: FloatArray = within_x + within_y - 2.0 * between
    return result


def mmd_permutation_test(
    X: ArrayLike,
    Y: ArrayLike,
    n_permutations: int,
    rng: np.random.Generator,
    max_samples: int = 1000,
    bandwidth: float | None = None,
) -> MMDTest:
    """Permutation test of "X and Y come from one distribution" by unbiased squared MMD.

    Parameters
    ----------
    X : array-like of shape (m, n_features)
        E.g. training-set states (standardise features beforehand so no unit dominates).
    Y : array-like of shape (n, n_features)
        E.g. the round's visited states.
    n_permutations : int
        Random relabellings of the pooled sample, >= 1.
    rng : numpy.random.Generator
        Used in this order: subsample X (``rng.choice(m, max_samples, replace=False)``, only if
        m > max_samples), then Y likewise, then one ``rng.permutation(m' + n')`` per
        permutation.
    max_samples : int, default 1000
        Cap on rows taken from each of X and Y; memory is O((m' + n')^2).
    bandwidth : float, optional
        Kernel length scale l in ``exp(-|x - y|^2 / (2 l^2))``; by default the median heuristic
        on the pooled subsamples. The round report leaves it to the heuristic; a fixed scale
        makes values comparable across calls.

    Returns
    -------
    MMDTest
        ``mmd2``: the unbiased squared MMD on the subsamples (Gretton et al. 2012, Lemma 6;
        within-sample means leave out i == j, so it can be slightly negative), ``bandwidth``
        and ``p_value = (1 + #{permuted mmd2 >= observed}) / (1 + n_permutations)``.
    """
    x, y = _check_pair(X, Y, minimum=2)
    if n_permutations < 1 or max_samples < 2:
        raise ValueError("n_permutations must be >= 1 and max_samples >= 2")
    if len(x) > max_samples:
        x = x[rng.choice(len(x), max_samples, replace=False)]
    if len(y) > max_samples:
        y = y[rng.choice(len(y), max_samples, replace=False)]
    x, y = _centre(x, y)
    pooled = np.vstack([x, y])
    m, size = len(x), len(pooled)
    if bandwidth is None:
        bandwidth = median_heuristic(pooled)
    kernel = _rbf(_squared_distances(pooled, pooled), bandwidth)
    np.fill_diagonal(kernel, 1.0)
    row_sums = kernel.sum(axis=1)
    identity = np.zeros((1, size))
    identity[0, :m] = 1.0
    # The observed value goes through the same arithmetic as the permuted ones, so the identity
    # permutation ties exactly instead of differing in the last bit.
    observed = float(_permuted_mmd2(kernel, row_sums, identity, m)[0])
    at_least = 0
    batch = 64
    for start in range(0, n_permutations, batch):
        count = min(batch, n_permutations - start)
        assignments = np.zeros((count, size))
        for row in range(count):
            assignments[row, rng.permutation(size)[:m]] = 1.0
        at_least += int(np.sum(_permuted_mmd2(kernel, row_sums, assignments, m) >= observed))
    return MMDTest(observed, bandwidth, (1 + at_least) / (1 + n_permutations))


@dataclass(frozen=True)
class FeatureShift:
    """One feature's standardised mean difference (Y minus X over the pooled std)."""

    name: str
    smd: float
    mean_x: float
    mean_y: float
    pooled_std: float


def standardised_mean_difference(
    X: ArrayLike, Y: ArrayLike, feature_names: list[str] | tuple[str, ...]
) -> list[FeatureShift]:
    """Per-feature shift ``(mean(Y) - mean(X)) / s_pooled``, largest |SMD| first.

    ``s_pooled = sqrt(((m-1) s_x^2 + (n-1) s_y^2) / (m + n - 2))`` with ddof=1 variances
    (Cohen's d). A feature constant in both samples gets 0 if the means match and +-inf if
    they differ. Ties in |SMD| keep the input feature order.

    Parameters
    ----------
    X : array-like of shape (m, n_features), m >= 2
        Reference sample (training set).
    Y : array-like of shape (n, n_features), n >= 2
        Compared sample (the round's visited states).
    feature_names : sequence of str, length n_features
    """
    x, y = _check_pair(X, Y, minimum=2)
    if len(feature_names) != x.shape[1]:
        raise ValueError(f"{len(feature_names)} feature names for {x.shape[1]} features")
    m, n = len(x), len(y)
    mean_x, mean_y = x.mean(axis=0), y.mean(axis=0)
    pooled_var = ((m - 1) * x.var(axis=0, ddof=1) + (n - 1) * y.var(axis=0, ddof=1)) / (m + n - 2)
    pooled_std = np.sqrt(pooled_var)
    difference = mean_y - mean_x
    with np.errstate(invalid="ignore", divide="ignore"):
        smd = np.where(difference == 0, 0.0, difference / pooled_std)
    order = np.argsort(-np.abs(smd), kind="stable")
    return [
        FeatureShift(
            feature_names[i],
            float(smd[i]),
            float(mean_x[i]),
            float(mean_y[i]),
            float(pooled_std[i]),
        )
        for i in order
    ]
