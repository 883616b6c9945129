"""Annotator agreement: Cohen's and Fleiss' kappa, Krippendorff's alpha, and each
annotator's agreement with the consensus.

Pure functions over numpy arrays, with the conventions stated in app.reports.rates.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .rates import FloatArray

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
