"""Uncertainty scores and their combination with novelty.

Pure functions over numpy arrays. Every score is oriented so that *larger means a label is
more useful*, except :func:`margin`, which keeps its textbook orientation (smaller = more
uncertain); rank with :func:`margin_uncertainty` instead.

All entropies are in nats (natural logarithm).
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

# scipy is imported inside the functions that use it: at module level it cost every server
# process some 70 MB of memory and 1.8 s of start-up, though only ranking jobs need it.

FloatArray = NDArray[np.float64]

# Learner probabilities arrive as float32 softmax outputs; a row further than this from 1 is
# almost certainly the wrong column (logits, counts), so it is refused rather than normalised.
_PROBABILITY_SUM_TOLERANCE = 1e-3

DiscreteMethod = Literal["entropy", "margin", "least_confidence"]


def _as_probabilities(probs: ArrayLike, ndim: int, name: str) -> FloatArray:
    """Validate probability rows along the last axis and renormalise away float error."""
    p = np.asarray(probs, dtype=np.float64)
    if p.ndim != ndim:
        raise ValueError(f"{name}: expected a {ndim}-d array, got shape {p.shape}")
    if p.shape[-1] < 2:
        raise ValueError(f"{name}: need at least 2 actions, got {p.shape[-1]}")
    if not np.all(np.isfinite(p)):
        raise ValueError(f"{name}: contains NaN or infinite values")
    if np.any(p < 0):
        raise ValueError(f"{name}: contains negative probabilities")
    sums = p.sum(axis=-1, keepdims=True)
    bad = np.abs(sums - 1.0) > _PROBABILITY_SUM_TOLERANCE
    if np.any(bad):
        first = tuple(int(i) for i in np.argwhere(bad[..., 0])[0])
        total = float(sums[first][0])
        raise ValueError(
            f"{name}: row {first} sums to {total:.6g}, not 1;"
            " pass probabilities, not logits or counts"
        )
    return p / sums


def _as_bounds(low: ArrayLike, high: ArrayLike, n_dims: int) -> FloatArray:
    """Return the action range ``high - low`` of shape (n_dims,), checked positive."""
    lo = np.broadcast_to(np.asarray(low, dtype=np.float64), (n_dims,))
    hi = np.broadcast_to(np.asarray(high, dtype=np.float64), (n_dims,))
    width = hi - lo
    if not np.all(np.isfinite(width)) or np.any(width <= 0):
        raise ValueError("action bounds: every dimension needs finite low < high")
    return width


def entropy(probs: ArrayLike) -> FloatArray:
    """Shannon entropy of each row, in nats.

    Parameters
    ----------
    probs : array_like of shape (n_states, n_actions)
        Action probabilities; each row sums to 1. Zero entries are allowed.

    Returns
    -------
    ndarray of shape (n_states,)
        ``-sum(p * log p)``, with ``0 log 0 = 0`` (via ``scipy.special.entr``).
    """
    p = _as_probabilities(probs, 2, "probs")
    from scipy.special import entr

    return np.asarray(entr(p).sum(axis=1), dtype=np.float64)


def _top_two(p: FloatArray) -> tuple[FloatArray, FloatArray]:
    top2 = -np.partition(-p, 1, axis=1)[:, :2]
    return top2[:, 0], top2[:, 1]


def margin(probs: ArrayLike) -> FloatArray:
    """Gap between the two most probable actions; smaller means more uncertain.

    Parameters
    ----------
    probs : array_like of shape (n_states, n_actions)

    Returns
    -------
    ndarray of shape (n_states,)
        ``p_(1) - p_(2)`` in [0, 1].
    """
    first, second = _top_two(_as_probabilities(probs, 2, "probs"))
    return first - second


def margin_uncertainty(probs: ArrayLike) -> FloatArray:
    """``1 - margin(probs)``, oriented so that larger means more uncertain.

    Parameters
    ----------
    probs : array_like of shape (n_states, n_actions)

    Returns
    -------
    ndarray of shape (n_states,)
    """
    return 1.0 - margin(probs)


def least_confidence(probs: ArrayLike) -> FloatArray:
    """``1 - max_a p(a)``; larger means more uncertain.

    Parameters
    ----------
    probs : array_like of shape (n_states, n_actions)

    Returns
    -------
    ndarray of shape (n_states,)
    """
    p = _as_probabilities(probs, 2, "probs")
    return np.asarray(1.0 - p.max(axis=1), dtype=np.float64)


def bald(member_probs: ArrayLike) -> FloatArray:
    """BALD mutual information between the action and the ensemble member, in nats.

    ``H[mean_m p_m] - mean_m H[p_m]``: high when members are each confident but disagree.
    Probabilities (not logits) are averaged.

    Parameters
    ----------
    member_probs : array_like of shape (n_states, n_members, n_actions)

    Returns
    -------
    ndarray of shape (n_states,)
        Clipped at 0, since rounding can give values near -1e-17.
    """
    p = _as_probabilities(member_probs, 3, "member_probs")
    from scipy.special import entr

    entropy_of_mean = entr(p.mean(axis=1)).sum(axis=1)
    mean_entropy = entr(p).sum(axis=2).mean(axis=1)
    return np.asarray(np.clip(entropy_of_mean - mean_entropy, 0.0, None), dtype=np.float64)


def ensemble_action_variance(
    member_actions: ArrayLike, low: ArrayLike, high: ArrayLike
) -> FloatArray:
    """Disagreement of a continuous-action ensemble, relative to the action range.

    For each dimension the population variance (ddof=0) over members is divided by
    ``(high - low) ** 2``, so that dimensions in different units count alike and the score
    lies in [0, 0.25] for actions inside the bounds (the largest possible variance of values
    in an interval of width w is (w / 2) ** 2). The mean is then taken over dimensions.

    Parameters
    ----------
    member_actions : array_like of shape (n_states, n_members, n_dims)
    low, high : array_like of shape (n_dims,) or scalar
        Action bounds, ``low < high`` in every dimension.

    Returns
    -------
    ndarray of shape (n_states,)
    """
    a = np.asarray(member_actions, dtype=np.float64)
    if a.ndim != 3:
        raise ValueError(f"member_actions: expected shape (n, members, dims), got {a.shape}")
    if a.shape[1] < 2:
        raise ValueError("member_actions: an ensemble needs at least 2 members")
    if not np.all(np.isfinite(a)):
        raise ValueError("member_actions: contains NaN or infinite values")
    width = _as_bounds(low, high, a.shape[2])
    return np.asarray((a.var(axis=1) / width**2).mean(axis=1), dtype=np.float64)


def gaussian_std_scaled(std: ArrayLike, low: ArrayLike, high: ArrayLike) -> FloatArray:
    """Gaussian policy standard deviation relative to the action range.

    Parameters
    ----------
    std : array_like of shape (n_states, n_dims)
        Non-negative standard deviations reported by the policy.
    low, high : array_like of shape (n_dims,) or scalar

    Returns
    -------
    ndarray of shape (n_states,)
        Mean over dimensions of ``std / (high - low)``.
    """
    s = np.asarray(std, dtype=np.float64)
    if s.ndim != 2:
        raise ValueError(f"std: expected shape (n, dims), got {s.shape}")
    if not np.all(np.isfinite(s)) or np.any(s < 0):
        raise ValueError("std: must be finite and non-negative")
    width = _as_bounds(low, high, s.shape[1])
    return np.asarray((s / width).mean(axis=1), dtype=np.float64)


def uncertainty_from_learner_outputs(
    kind: Literal["discrete", "continuous"],
    probs: ArrayLike | None = None,
    ensemble: ArrayLike | None = None,
    std: ArrayLike | None = None,
    low: ArrayLike | None = None,
    high: ArrayLike | None = None,
    method: DiscreteMethod = "entropy",
) -> tuple[FloatArray | None, str]:
    """Pick the uncertainty score that the learner's outputs support, and compute it.

    Order of preference: an ensemble (BALD for discrete, variance for continuous) carries
    more information than a single model's probabilities or standard deviation.

    Parameters
    ----------
    kind : {"discrete", "continuous"}
        The loop's action space.
    probs : array_like of shape (n_states, n_actions), optional
        Discrete action probabilities.
    ensemble : array_like of shape (n_states, n_members, n_actions or n_dims), optional
        Member probabilities (discrete) or member actions (continuous).
    std : array_like of shape (n_states, n_dims), optional
        Gaussian policy standard deviations (continuous).
    low, high : array_like of shape (n_dims,), optional
        Action bounds; required for continuous scores.
    method : {"entropy", "margin", "least_confidence"}
        Score for single-model discrete probabilities. "margin" returns ``1 - margin``.

    Returns
    -------
    scores : ndarray of shape (n_states,) or None
        None when the learner reported nothing usable: rank by novelty only.
    name : str
        One of "bald", "entropy", "margin", "least_confidence", "ensemble_variance",
        "gaussian_std", "novelty only".
    """
    if kind == "discrete":
        if ensemble is not None:
            return bald(ensemble), "bald"
        if probs is not None:
            if method == "entropy":
                return entropy(probs), "entropy"
            if method == "margin":
                return margin_uncertainty(probs), "margin"
            if method == "least_confidence":
                return least_confidence(probs), "least_confidence"
            raise ValueError(f"method: unknown discrete score {method!r}")
        return None, "novelty only"
    if kind == "continuous":
        if ensemble is None and std is None:
            return None, "novelty only"
        if low is None or high is None:
            raise ValueError("continuous uncertainty needs the action bounds low and high")
        if ensemble is not None:
            return ensemble_action_variance(ensemble, low, high), "ensemble_variance"
        assert std is not None  # one of ensemble and std is set (checked above)
        return gaussian_std_scaled(std, low, high), "gaussian_std"
    raise ValueError(f"kind: expected 'discrete' or 'continuous', got {kind!r}")


def percentile_rank(x: ArrayLike) -> FloatArray:
    """Percentile rank of each value, in (0, 1]; ties get their average rank.

    Parameters
    ----------
    x : array_like of shape (n_states,)

    Returns
    -------
    ndarray of shape (n_states,)
        ``rankdata(x, method="average") / n``: the largest value maps to 1.
    """
    v = np.asarray(x, dtype=np.float64)
    if v.ndim != 1:
        raise ValueError(f"percentile_rank: expected a 1-d array, got shape {v.shape}")
    if not np.all(np.isfinite(v)):
        raise ValueError("percentile_rank: contains NaN or infinite values")
    if v.size == 0:
        return v.copy()
    from scipy.stats import rankdata

    return np.asarray(rankdata(v, method="average") / v.size, dtype=np.float64)


def combined_score(
    uncertainty_pct: ArrayLike | None,
    novelty_pct: ArrayLike | None,
    w_uncertainty: float = 0.5,
    w_novelty: float = 0.5,
) -> FloatArray:
    """Weighted mean of uncertainty and novelty percentile ranks.

    Percentile ranks make the two comparable whatever their units. When one of them is
    missing (learner reported no uncertainty; no training set yet) the other is used alone.

    Parameters
    ----------
    uncertainty_pct, novelty_pct : array_like of shape (n_states,) or None
        Outputs of :func:`percentile_rank`. At least one must be given.
    w_uncertainty, w_novelty : float
        Non-negative weights, not both zero; they are normalised to sum to 1.

    Returns
    -------
    ndarray of shape (n_states,)
    """
    if uncertainty_pct is None and novelty_pct is None:
        raise ValueError("combined_score: need uncertainty or novelty (both are None)")
    if uncertainty_pct is None:
        return np.asarray(novelty_pct, dtype=np.float64).copy()
    if novelty_pct is None:
        return np.asarray(uncertainty_pct, dtype=np.float64).copy()
    if w_uncertainty < 0 or w_novelty < 0 or w_uncertainty + w_novelty <= 0:
        raise ValueError("combined_score: weights must be non-negative and not both zero")
    u = np.asarray(uncertainty_pct, dtype=np.float64)
    n = np.asarray(novelty_pct, dtype=np.float64)
    if u.shape != n.shape or u.ndim != 1:
        raise ValueError(f"combined_score: shapes differ or not 1-d: {u.shape} vs {n.shape}")
    total = w_uncertainty + w_novelty
    return np.asarray((w_uncertainty * u + w_novelty * n) / total, dtype=np.float64)
