"""Statistics for the round report: disagreement, shift, annotator agreement, labelling pace.

Pure functions over numpy arrays; a report service loads arrays in bulk and calls these.
Only numpy and the standard library are used at run time (scipy, statsmodels and
krippendorff are test-only references, see tests/unit/test_report_stats.py).

Conventions
-----------
- Discrete actions are integer indices; -1 means "no action" (an unsure answer, an
  unresolved consensus, or no previous step) and is left out where stated.
- Intervals are Wilson score intervals (Wilson 1927) unless stated otherwise.
- Quantities that are undefined for the data given (no trials, no pairable values) come out
  as ``nan`` rather than raising, so a report can show "not enough data".
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from statistics import NormalDist
from typing import Literal, NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

MIN_AUDIT_LABELS = 30
"""Fewest audit labels for which a report quotes a disagreement rate.

Common practice: n >= 30 is the usual rule of thumb for a normal-approximation summary of a
proportion. The Wilson interval stays valid below it, but so wide that the rate alone misleads,
so the report says "too few audit labels" instead.
"""

IDLE_GAP_SECONDS = 900.0
"""Gap between consecutive labels of one annotator above which the time counts as idle (15 min)."""

FloatArray = NDArray[np.float64]


class Interval(NamedTuple):
    """Lower and upper bound of a confidence interval (floats or arrays of one shape)."""

    lower: FloatArray | float
    upper: FloatArray | float


def _z(confidence: float) -> float:
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must lie in (0, 1), got {confidence}")
    return NormalDist().inv_cdf(0.5 + confidence / 2.0)


def wilson_interval(k: ArrayLike, n: ArrayLike, confidence: float = 0.95) -> Interval:
    """Wilson score interval for a binomial proportion k/n (Wilson 1927), vectorised.

    Parameters
    ----------
    k : array-like of int
        Successes; broadcast against ``n``; ``0 <= k <= n``.
    n : array-like of int
        Trials; where ``n == 0`` both bounds are ``nan``.
    confidence : float, default 0.95
        Two-sided confidence level.

    Returns
    -------
    Interval
        ``(lower, upper)`` with the broadcast shape of k and n; exactly 0 at k = 0 and exactly
        1 at k = n.
    """
    z = _z(confidence)
    successes, trials = np.broadcast_arrays(np.asarray(k, np.float64), np.asarray(n, np.float64))
    if np.any(trials < 0) or np.any(successes < 0) or np.any(successes > trials):
        raise ValueError("wilson_interval needs 0 <= k <= n")
    with np.errstate(invalid="ignore", divide="ignore"):
        p = successes / trials
        denominator = 1.0 + z * z / trials
        centre = (p + z * z / (2.0 * trials)) / denominator
        half = z * np.sqrt(p * (1.0 - p) / trials + z * z / (4.0 * trials * trials)) / denominator
    # At k = 0 and k = n the exact bounds are 0 and 1; rounding would leave 1e-17 off them.
    lower = np.where(successes == 0, 0.0, np.clip(centre - half, 0.0, 1.0))
    upper = np.where(successes == trials, 1.0, np.clip(centre + half, 0.0, 1.0))
    lower = np.where(trials > 0, lower, np.nan)
    upper = np.where(trials > 0, upper, np.nan)
    return Interval(lower[()], upper[()])


def audit_sufficient(n_audit: int, minimum: int = MIN_AUDIT_LABELS) -> bool:
    """True when ``n_audit`` labels are enough to quote a rate (see MIN_AUDIT_LABELS)."""
    return int(n_audit) >= minimum


# --- learner versus expert ------------------------------------------------------------------


@dataclass(frozen=True)
class Disagreement:
    """How often the learner's action differs from the expert's, with a Wilson interval.

    Attributes
    ----------
    count, n : int
        States with disagreement, and states compared.
    n_excluded : int
        States left out because the expert label was missing (-1 or ``nan``) or, for
        :func:`disagreement_by_change`, the previous action was missing.
    rate, lower, upper : float
        ``count / n`` and its 95% Wilson interval; ``nan`` when ``n == 0``.
    mean_absolute_error : ndarray of shape (n_dims,) or None
        Continuous actions only: mean |learner - expert| per dimension over compared states.
    """

    count: int
    n: int
    n_excluded: int
    rate: float
    lower: float
    upper: float
    mean_absolute_error: FloatArray | None = None


def _summarise(differs: NDArray[np.bool_], n_excluded: int) -> Disagreement:
    count, n = int(differs.sum()), int(differs.size)
    lower, upper = wilson_interval(count, n)
    rate = count / n if n else float("nan")
    return Disagreement(count, n, n_excluded, rate, float(lower), float(upper))


def _discrete_pair(learner: ArrayLike, expert: ArrayLike) -> tuple[NDArray, NDArray]:
    learner_action, expert_action = np.asarray(learner), np.asarray(expert)
    if learner_action.ndim != 1 or learner_action.shape != expert_action.shape:
        raise ValueError("learner and expert actions must be 1-D arrays of equal length")
    for name, array in (("learner", learner_action), ("expert", expert_action)):
        if array.size and not np.issubdtype(array.dtype, np.integer):
            raise ValueError(f"{name} actions must be integer indices, got {array.dtype}")
    return learner_action, expert_action


def disagreement(learner_action: ArrayLike, expert_action: ArrayLike) -> Disagreement:
    """Discrete learner-versus-expert disagreement rate with its Wilson interval.

    Parameters
    ----------
    learner_action : array-like of int, shape (n_states,)
        The learner's action on each state.
    expert_action : array-like of int, shape (n_states,)
        The expert (consensus) action; -1 (unresolved) states are left out.
    """
    learner, expert = _discrete_pair(learner_action, expert_action)
    keep = expert >= 0
    return _summarise(learner[keep] != expert[keep], int((~keep).sum()))


def continuous_disagreement(
    learner_action: ArrayLike, expert_action: ArrayLike, tolerance: ArrayLike
) -> Disagreement:
    """Continuous disagreement: a state disagrees when any dimension differs by more than its
    tolerance.

    Parameters
    ----------
    learner_action : array-like of float, shape (n_states, n_dims)
    expert_action : array-like of float, shape (n_states, n_dims)
        Rows containing ``nan`` (no consensus) are left out.
    tolerance : array-like of float, shape (n_dims,)
        Largest difference per dimension still counted as agreement, in the dimension's unit.
    """
    learner = np.asarray(learner_action, np.float64)
    expert = np.asarray(expert_action, np.float64)
    tolerances = np.asarray(tolerance, np.float64)
    if learner.ndim != 2 or learner.shape != expert.shape:
        raise ValueError("learner and expert actions must be 2-D arrays of equal shape")
    if tolerances.shape != (learner.shape[1],) or np.any(tolerances < 0):
        raise ValueError(f"tolerance must be {learner.shape[1]} non-negative numbers")
    keep = ~np.isnan(expert).any(axis=1)
    error = np.abs(learner[keep] - expert[keep])
    result = _summarise(np.any(error > tolerances, axis=1), int((~keep).sum()))
    mae = error.mean(axis=0) if len(error) else np.full(learner.shape[1], np.nan)
    return replace(result, mean_absolute_error=mae)


@dataclass(frozen=True)
class DisagreementByChange:
    """Disagreement split by whether the expert's action differs from the previous action.

    ``changed`` holds states where the expert label differs from the learner's action at the
    previous step (copying the previous action would be wrong there); ``unchanged`` holds the
    rest. A policy that copies its last action looks accurate overall and fails in ``changed``.
    """

    changed: Disagreement
    unchanged: Disagreement


def disagreement_by_change(
    learner_action: ArrayLike, expert_action: ArrayLike, previous_learner_action: ArrayLike
) -> DisagreementByChange:
    """Discrete disagreement on states where the expert changes action versus where not.

    Parameters
    ----------
    learner_action, expert_action : array-like of int, shape (n_states,)
        As in :func:`disagreement`; states with expert -1 are left out of both groups.
    previous_learner_action : array-like of int, shape (n_states,)
        The learner's action at the step before each state in its rollout; -1 where there is
        none (first step), and such states are left out of both groups.
    """
    learner, expert = _discrete_pair(learner_action, expert_action)
    _, previous = _discrete_pair(learner_action, previous_learner_action)
    keep = (expert >= 0) & (previous >= 0)
    excluded = int((~keep).sum())
    changed = keep & (expert != previous)
    unchanged = keep & (expert == previous)
    return DisagreementByChange(
        changed=_summarise(learner[changed] != expert[changed], excluded),
        unchanged=_summarise(learner[unchanged] != expert[unchanged], excluded),
    )


# --- shift between visited states and the training set --------------------------------------


def _squared_distances(a: FloatArray, b: FloatArray) -> FloatArray:
    # Expansion |a|^2 + |b|^2 - 2ab in float64; callers centre the data first because the
    # expansion cancels badly far from the origin (REFERENCES.md section 9).
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


def rbf_kernel_matrix(A: ArrayLike, B: ArrayLike, bandwidth: float) -> FloatArray:
    """Gaussian kernel ``exp(-|a - b|^2 / (2 bandwidth^2))`` between rows of A and B.

    Returns an ndarray of shape (len(A), len(B)); sklearn's ``rbf_kernel`` with
    ``gamma = 1 / (2 bandwidth^2)``.
    """
    a, b = _as_samples(A, B, minimum=0)
    return _rbf(_squared_distances(a, b), bandwidth)


def _mmd2_terms(X: ArrayLike, Y: ArrayLike, bandwidth: float) -> tuple[FloatArray, ...]:
    x, y = _as_samples(X, Y, minimum=2)
    k_xx = _rbf(_squared_distances(x, x), bandwidth)
    k_yy = _rbf(_squared_distances(y, y), bandwidth)
    np.fill_diagonal(k_xx, 1.0)  # exact self-similarity; the expansion can leave 1 - 1e-16
    np.fill_diagonal(k_yy, 1.0)
    return k_xx, k_yy, _rbf(_squared_distances(x, y), bandwidth)


def mmd2_unbiased(X: ArrayLike, Y: ArrayLike, bandwidth: float) -> float:
    """Unbiased squared MMD with an RBF kernel (Gretton et al. 2012, Lemma 6).

    Parameters
    ----------
    X : array-like of shape (m, n_features), m >= 2
    Y : array-like of shape (n, n_features), n >= 2
    bandwidth : float
        Kernel length scale l in ``exp(-|x - y|^2 / (2 l^2))``.

    Returns
    -------
    float
        Within-sample means leave out i == j; can be slightly negative (do not clamp).
        Memory is O((m + n)^2).
    """
    k_xx, k_yy, k_xy = _mmd2_terms(X, Y, bandwidth)
    m, n = len(k_xx), len(k_yy)
    within_x = (k_xx.sum() - m) / (m * (m - 1))
    within_y = (k_yy.sum() - n) / (n * (n - 1))
    return float(within_x + within_y - 2.0 * k_xy.mean())


def mmd2_biased(X: ArrayLike, Y: ArrayLike, bandwidth: float) -> float:
    """Biased (V-statistic) squared MMD: plain kernel means, diagonals included."""
    k_xx, k_yy, k_xy = _mmd2_terms(X, Y, bandwidth)
    return float(k_xx.mean() + k_yy.mean() - 2.0 * k_xy.mean())


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

    Returns
    -------
    MMDTest
        ``mmd2`` (unbiased, on the subsamples), ``bandwidth`` (median heuristic on the pooled
        subsamples) and ``p_value = (1 + #{permuted mmd2 >= observed}) / (1 + n_permutations)``.
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


# --- annotator agreement ---------------------------------------------------------------------

KappaWeights = Literal["linear", "quadratic"] | None


def cohen_kappa(
    a: ArrayLike, b: ArrayLike, n_categories: int, weights: KappaWeights = None
) -> float:
    """Cohen's kappa between two annotators (Cohen 1960; weighted, Cohen 1968).

    Parameters
    ----------
    a, b : array-like of int, shape (n_items,)
        Category indices in ``range(n_categories)`` given by the two annotators to the same
        items; pairs where either is -1 (unsure) are left out.
    n_categories : int
        Number of categories; weights use category *indices*, so unused categories still
        count in the distance.
    weights : {None, "linear", "quadratic"}
        Disagreement weight |i - j| or (i - j)^2; None for unweighted kappa.

    Returns
    -------
    float
        ``1 - sum(w * observed) / sum(w * expected)``; ``nan`` with no pairs or when chance
        agreement is already perfect.
    """
    first, second = np.asarray(a), np.asarray(b)
    if first.shape != second.shape or first.ndim != 1:
        raise ValueError("a and b must be 1-D arrays of equal length")
    keep = (first >= 0) & (second >= 0)
    first, second = first[keep].astype(np.int64), second[keep].astype(np.int64)
    if first.size and max(first.max(), second.max()) >= n_categories:
        raise ValueError(f"category indices must lie in [0, {n_categories})")
    if first.size == 0:
        return float("nan")
    table = np.bincount(first * n_categories + second, minlength=n_categories**2)
    observed = table.reshape(n_categories, n_categories) / first.size
    expected = np.outer(observed.sum(axis=1), observed.sum(axis=0))
    index = np.arange(n_categories)
    if weights is None:
        weight = 1.0 - np.eye(n_categories)
    elif weights == "linear":
        weight = np.abs(index[:, None] - index[None, :]).astype(np.float64)
    elif weights == "quadratic":
        weight = ((index[:, None] - index[None, :]) ** 2).astype(np.float64)
    else:
        raise ValueError(f"weights must be None, 'linear' or 'quadratic', got {weights!r}")
    chance = float((weight * expected).sum())
    return float("nan") if chance == 0 else 1.0 - float((weight * observed).sum()) / chance


def fleiss_kappa(counts: ArrayLike) -> float:
    """Fleiss' kappa for many annotators (Fleiss 1971).

    Parameters
    ----------
    counts : array-like of int, shape (n_subjects, n_categories)
        ``counts[i, j]`` = annotators who put subject i in category j; every row must have the
        same total n >= 2 (the number of annotators per subject).

    Returns
    -------
    float
        ``(P_bar - P_e) / (1 - P_e)``; ``nan`` when P_e = 1 (one category used throughout).
    """
    table = np.asarray(counts)
    if table.ndim != 2 or table.shape[0] == 0:
        raise ValueError("counts must be a non-empty subject x category table")
    if np.any(table < 0) or not np.all(table == np.round(table)):
        raise ValueError("counts must be non-negative integers")
    table = table.astype(np.float64)
    raters = table.sum(axis=1)
    if np.any(raters != raters[0]) or raters[0] < 2:
        raise ValueError("every subject needs the same number (>= 2) of ratings")
    n = raters[0]
    per_subject = ((table * table).sum(axis=1) - n) / (n * (n - 1))
    category_share = table.sum(axis=0) / table.sum()
    chance = float((category_share**2).sum())
    return float("nan") if chance == 1.0 else (per_subject.mean() - chance) / (1.0 - chance)


MeasurementLevel = Literal["nominal", "ordinal", "interval", "ratio"]


def krippendorff_alpha(
    reliability_data: ArrayLike,
    level: MeasurementLevel = "nominal",
    value_domain: ArrayLike | None = None,
) -> float:
    """Krippendorff's alpha from the coincidence matrix (Krippendorff 2011).

    Parameters
    ----------
    reliability_data : array-like of float, shape (n_annotators, n_units)
        One row per annotator, one column per unit (state); ``nan`` = not labelled. Units with
        fewer than two values are not pairable and drop out.
    level : {"nominal", "ordinal", "interval", "ratio"}, default "nominal"
        Level of measurement: discrete actions are nominal; continuous ones interval.
    value_domain : array-like, optional
        All possible values in order (ordinal level: categories nobody used still count in
        the rank distance). Defaults to the sorted observed values.

    Returns
    -------
    float
        ``1 - (n - 1) sum(o * delta^2) / sum(n_c n_k delta^2)``; ``nan`` with no pairable
        values or no variation.
    """
    data = np.asarray(reliability_data, np.float64)
    if data.ndim != 2:
        raise ValueError("reliability_data must be 2-D (annotators x units)")
    units, annotators = np.nonzero(~np.isnan(data.T))
    values = data.T[units, annotators]
    domain = np.unique(values) if value_domain is None else np.asarray(value_domain, np.float64)
    position = np.searchsorted(domain, values)
    if values.size and (
        np.any(position >= len(domain))
        or np.any(domain[np.minimum(position, len(domain) - 1)] != values)
    ):
        raise ValueError("value_domain must be sorted and contain every observed value")
    size = len(domain)
    per_unit = np.bincount(units * size + position, minlength=data.shape[1] * size)
    per_unit = per_unit.reshape(data.shape[1], size).astype(np.float64)
    paired = per_unit.sum(axis=1)
    per_unit = per_unit[paired >= 2]
    weight = 1.0 / (per_unit.sum(axis=1) - 1.0)
    weighted = per_unit * weight[:, None]
    coincidence = weighted.T @ per_unit - np.diag(weighted.sum(axis=0))
    marginal = coincidence.sum(axis=1)
    total = marginal.sum()
    delta2 = _alpha_distance(level, domain, marginal)
    expected = float((np.outer(marginal, marginal) * delta2).sum())
    if total <= 1 or expected == 0:
        return float("nan")
    return 1.0 - (total - 1.0) * float((coincidence * delta2).sum()) / expected


def _alpha_distance(level: str, domain: FloatArray, marginal: FloatArray) -> FloatArray:
    c, k = domain[:, None], domain[None, :]
    if level == "nominal":
        return (c != k).astype(np.float64)
    if level == "interval":
        return (c - k) ** 2
    if level == "ratio":
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(c + k == 0, 0.0, ((c - k) / (c + k)) ** 2)
    if level == "ordinal":
        # Sum of marginals from category c to k, minus half of each end (Krippendorff 2011).
        cumulative = np.cumsum(marginal)
        low = np.minimum.outer(np.arange(len(domain)), np.arange(len(domain)))
        high = np.maximum.outer(np.arange(len(domain)), np.arange(len(domain)))
        between = cumulative[high] - cumulative[low] + (marginal[low] - marginal[high]) / 2.0
        return between**2
    raise ValueError(f"level must be nominal, ordinal, interval or ratio, got {level!r}")


@dataclass(frozen=True)
class AnnotatorAgreement:
    """Per-annotator agreement with consensus (arrays of shape (n_annotators,))."""

    annotator_ids: NDArray
    n_compared: NDArray[np.int64]
    n_agreeing: NDArray[np.int64]
    fraction: FloatArray


def agreement_with_consensus(
    annotator_ids: ArrayLike,
    state_index: ArrayLike,
    action: ArrayLike,
    consensus_action: ArrayLike,
) -> AnnotatorAgreement:
    """Fraction of each annotator's votes that match the consensus action.

    Only resolved states (consensus >= 0) and real votes (action >= 0, not unsure) count. The
    annotator's own vote is part of the consensus, so with few labels per state this reads
    high; compare annotators with each other, not with 1.

    Parameters
    ----------
    annotator_ids : array-like, shape (n_labels,)
        Who gave each label (any sortable ids).
    state_index : array-like of int, shape (n_labels,)
        Index into ``consensus_action``.
    action : array-like of int, shape (n_labels,)
        The labelled action, -1 for unsure.
    consensus_action : array-like of int, shape (n_states,)
        E.g. ``DiscreteConsensus.action``; -1 for unresolved.
    """
    ids, states, actions = np.asarray(annotator_ids), np.asarray(state_index), np.asarray(action)
    consensus = np.asarray(consensus_action)
    if not (ids.shape == states.shape == actions.shape) or ids.ndim != 1:
        raise ValueError("annotator_ids, state_index and action must be 1-D of equal length")
    if states.size and (states.min() < 0 or states.max() >= len(consensus)):
        raise ValueError(f"state_index must lie in [0, {len(consensus)})")
    unique_ids, who = np.unique(ids, return_inverse=True)
    target = consensus[states] if states.size else np.zeros(0, np.int64)
    counted = (actions >= 0) & (target >= 0)
    compared = np.bincount(who[counted], minlength=len(unique_ids)).astype(np.int64)
    matches = counted & (actions == target)
    agreeing = np.bincount(who[matches], minlength=len(unique_ids)).astype(np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = np.where(compared > 0, agreeing / np.maximum(compared, 1), np.nan)
    return AnnotatorAgreement(unique_ids, compared, agreeing, fraction)


# --- labelling pace and anchoring -----------------------------------------------------------


@dataclass(frozen=True)
class LabellingPace:
    """Labels per active hour.

    ``timed_labels`` are labels that follow another label of the same annotator within the
    idle gap (their labelling time is known); ``active_hours`` is the sum of those gaps.
    """

    labels_per_hour: float
    timed_labels: int
    active_hours: float
    n_labels: int


def labels_per_hour(
    timestamps_seconds: ArrayLike,
    annotator_ids: ArrayLike | None = None,
    idle_gap_seconds: float = IDLE_GAP_SECONDS,
) -> LabellingPace:
    """Labelling pace: timed labels per active hour, idle gaps excluded.

    Definition: sort each annotator's submission times; each gap of at most
    ``idle_gap_seconds`` is the time spent on the label that ends it. Longer gaps are breaks:
    neither the gap nor the label after it (whose working time is unknown) counts. So
    ``labels_per_hour = timed_labels / active_hours``; with several annotators it is labels per
    person-hour. ``nan`` when no gap is timed (fewer than two labels in a session).

    Parameters
    ----------
    timestamps_seconds : array-like of float, shape (n_labels,)
        Submission times in seconds (any epoch).
    annotator_ids : array-like, shape (n_labels,), optional
        Who submitted each label; gaps are only taken within one annotator. None = one person.
    idle_gap_seconds : float, default 900 (15 minutes)
    """
    times = np.asarray(timestamps_seconds, np.float64)
    if times.ndim != 1 or not np.all(np.isfinite(times)):
        raise ValueError("timestamps_seconds must be a 1-D array of finite numbers")
    if idle_gap_seconds <= 0:
        raise ValueError("idle_gap_seconds must be > 0")
    who = np.zeros(len(times), np.int64) if annotator_ids is None else np.asarray(annotator_ids)
    if who.shape != times.shape:
        raise ValueError("annotator_ids must match timestamps_seconds in length")
    order = np.lexsort((times, who))
    gaps = np.diff(times[order])
    same_person = who[order][1:] == who[order][:-1]
    active = same_person & (gaps <= idle_gap_seconds)
    active_seconds = float(gaps[active].sum())
    timed = int(active.sum())
    rate = timed / (active_seconds / 3600.0) if active_seconds > 0 else float("nan")
    return LabellingPace(rate, timed, active_seconds / 3600.0, len(times))


@dataclass(frozen=True)
class ShownHiddenEffect:
    """Agreement with the learner when its action is shown versus hidden.

    ``difference = rate_shown - rate_hidden``; ``lower``/``upper`` are its 95% interval by
    Newcombe's hybrid score method (Newcombe 1998, method 10). A clearly positive difference
    suggests the shown action anchors the expert.
    """

    n_shown: int
    n_hidden: int
    rate_shown: float
    rate_hidden: float
    difference: float
    lower: float
    upper: float


def newcombe_difference_interval(
    k1: int, n1: int, k2: int, n2: int, confidence: float = 0.95
) -> Interval:
    """Newcombe's hybrid score interval for p1 - p2 from the two Wilson intervals."""
    if n1 == 0 or n2 == 0:
        return Interval(np.float64(np.nan), np.float64(np.nan))
    l1, u1 = wilson_interval(k1, n1, confidence)
    l2, u2 = wilson_interval(k2, n2, confidence)
    p1, p2 = k1 / n1, k2 / n2
    lower = p1 - p2 - np.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2)
    upper = p1 - p2 + np.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)
    return Interval(lower, upper)


def shown_vs_hidden_effect(agree_with_learner: ArrayLike, shown: ArrayLike) -> ShownHiddenEffect:
    """Compare how often experts agree with the learner when shown its action versus not.

    Parameters
    ----------
    agree_with_learner : array-like of bool, shape (n_labels,)
        Whether each label equals the learner's action.
    shown : array-like of bool, shape (n_labels,)
        Whether the learner's action was shown on the bench for that label.
    """
    agree, visible = np.asarray(agree_with_learner), np.asarray(shown)
    if agree.dtype != np.bool_ or visible.dtype != np.bool_ or agree.shape != visible.shape:
        raise ValueError("agree_with_learner and shown must be bool arrays of equal shape")
    k1, n1 = int(agree[visible].sum()), int(visible.sum())
    k2, n2 = int(agree[~visible].sum()), int((~visible).sum())
    rate_shown = k1 / n1 if n1 else float("nan")
    rate_hidden = k2 / n2 if n2 else float("nan")
    lower, upper = newcombe_difference_interval(k1, n1, k2, n2)
    return ShownHiddenEffect(
        n1, n2, rate_shown, rate_hidden, rate_shown - rate_hidden, float(lower), float(upper)
    )
