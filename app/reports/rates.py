"""Proportions for the round report: learner-vs-expert disagreement with Wilson intervals,
and the effect of showing the learner's action.

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
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

MIN_AUDIT_LABELS = 30
"""Fewest audit labels for which a report quotes a disagreement rate.

Common practice: n >= 30 is the usual rule of thumb for a normal-approximation summary of a
proportion. The Wilson interval stays valid below it, but so wide that the rate alone misleads,
so the report says "too few audit labels" instead.
"""


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


# --- showing the learner's action -----------------------------------------------------------


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
