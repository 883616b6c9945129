"""Consensus per state from several expert labels: majority vote or per-dimension median.

Labels arrive as flat arrays, one entry per label (one annotator's answer on one state), so a
service can load them in bulk and call these functions once per round. Nothing here touches the
store.

Conventions shared by both functions:

- ``state_index`` maps each label to a state in ``range(n_states)``; states with no label at all
  come out unresolved, so the result always has one entry per state.
- An "unsure" answer is an answer but not a vote: it counts in ``label_count`` and never in
  ``vote_count``. A state whose answers are all unsure is unresolved.
- Unresolved states are reported, never guessed (docs/references.md, "Consensus").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

UNSURE = -1
"""Action index meaning "unsure" in discrete labels; such answers do not vote."""


@dataclass(frozen=True)
class DiscreteConsensus:
    """Majority-vote consensus per state (all arrays have shape (n_states,)).

    Attributes
    ----------
    action : ndarray of int64
        Winning action index, or -1 where the state is unresolved (no votes, or a tie for the
        most votes).
    label_count : ndarray of int64
        Number of answers on the state, unsure answers included.
    vote_count : ndarray of int64
        Number of votes (answers that named an action; unsure answers excluded).
    agreement : ndarray of float64
        Fraction of votes cast for the most-voted action, in (0, 1]; for a tie this is the
        tied share (e.g. 0.5 for a 1-1 split). ``nan`` where there are no votes.
    resolved : ndarray of bool
        True where exactly one action has the most votes.
    """

    action: NDArray[np.int64]
    label_count: NDArray[np.int64]
    vote_count: NDArray[np.int64]
    agreement: NDArray[np.float64]
    resolved: NDArray[np.bool_]


@dataclass(frozen=True)
class ContinuousConsensus:
    """Median consensus per state for continuous actions.

    Attributes
    ----------
    median : ndarray of shape (n_states, n_dims)
        Per-dimension median of the votes; ``nan`` rows where there are no votes.
    spread : ndarray of shape (n_states, n_dims)
        Per-dimension median absolute deviation from that median, unscaled (scale 1, in the
        dimension's own unit; multiply by 1.4826 for a normal-consistent sigma). ``nan`` where
        there are no votes; 0 for a single vote.
    label_count : ndarray of shape (n_states,)
        Number of answers on the state, unsure answers included.
    vote_count : ndarray of shape (n_states,)
        Number of votes (answers not marked unsure).
    agreement : ndarray of shape (n_states,)
        Fraction of votes lying within ``tolerance`` of the median in every dimension
        (``|vote - median| <= tolerance``). ``nan`` where there are no votes.
    resolved : ndarray of shape (n_states,)
        True where the state has at least one vote.
    """

    median: NDArray[np.float64]
    spread: NDArray[np.float64]
    label_count: NDArray[np.int64]
    vote_count: NDArray[np.int64]
    agreement: NDArray[np.float64]
    resolved: NDArray[np.bool_]


def one_vote_each(state: ArrayLike, annotator: ArrayLike, span: ArrayLike) -> NDArray[np.bool_]:
    """Which labels vote, so that each annotator has one vote on a state.

    A span label copies an answer onto the steps just before the state shown, which the same
    annotator may also have answered directly, or covered with another span: counted as they
    come, one person's answers made a majority or a tie on their own. Their direct answer
    votes (it was given looking at that state); without one, their newest span copy.

    Parameters
    ----------
    state, annotator : array_like of shape (n_labels,)
        Each label's state and annotator ids, labels in id order (oldest first).
    span : array_like of bool, shape (n_labels,)
        Whether each label is a span copy.

    Returns
    -------
    ndarray of bool, shape (n_labels,)
        True for the one label per (state, annotator) that votes.
    """
    states = np.asarray(state, dtype=np.int64)
    annotators = np.asarray(annotator, dtype=np.int64)
    copies = np.asarray(span, dtype=bool)
    n = len(states)
    keep = np.zeros(n, dtype=bool)
    if n == 0:
        return keep
    # by state, then annotator, then direct before span copies, then newest first
    order = np.lexsort((-np.arange(n), copies, annotators, states))
    s, a = states[order], annotators[order]
    first = np.ones(n, dtype=bool)
    first[1:] = (s[1:] != s[:-1]) | (a[1:] != a[:-1])
    keep[order[first]] = True
    return keep


def _check_state_index(state_index: ArrayLike, n_states: int) -> NDArray[np.int64]:
    states = np.asarray(state_index)
    if states.ndim != 1:
        raise ValueError(f"state_index must be 1-D, got shape {states.shape}")
    if states.size and not np.issubdtype(states.dtype, np.integer):
        raise ValueError(f"state_index must hold integers, got dtype {states.dtype}")
    if n_states < 0:
        raise ValueError(f"n_states must be >= 0, got {n_states}")
    states = states.astype(np.int64, copy=False)
    if states.size and (states.min() < 0 or states.max() >= n_states):
        raise ValueError(
            f"state_index values must lie in [0, {n_states}), got [{states.min()}, {states.max()}]"
        )
    return states


def discrete_consensus(
    state_index: ArrayLike, action_index: ArrayLike, n_states: int, n_actions: int
) -> DiscreteConsensus:
    """Majority vote per state; ties for the most votes stay unresolved.

    Parameters
    ----------
    state_index : array-like of int, shape (n_labels,)
        State of each label, in ``range(n_states)``.
    action_index : array-like of int, shape (n_labels,)
        Chosen action of each label in ``range(n_actions)``, or -1 for "unsure".
    n_states : int
        Number of states in the result.
    n_actions : int
        Size of the discrete action space.

    Returns
    -------
    DiscreteConsensus
        Arrays of shape (n_states,). Memory is O(n_states * n_actions).
    """
    states = _check_state_index(state_index, n_states)
    actions = np.asarray(action_index)
    if actions.shape != states.shape:
        raise ValueError(f"action_index shape {actions.shape} != state_index shape {states.shape}")
    if actions.size and not np.issubdtype(actions.dtype, np.integer):
        raise ValueError(f"action_index must hold integers, got dtype {actions.dtype}")
    if n_actions < 1:
        raise ValueError(f"n_actions must be >= 1, got {n_actions}")
    actions = actions.astype(np.int64, copy=False)
    if actions.size and (actions.min() < UNSURE or actions.max() >= n_actions):
        raise ValueError(f"action_index values must be -1 (unsure) or lie in [0, {n_actions})")

    label_count = np.bincount(states, minlength=n_states).astype(np.int64)
    votes = actions != UNSURE
    # One bincount over the flattened (state, action) grid replaces a loop over states.
    votes_per_action = np.bincount(
        states[votes] * n_actions + actions[votes], minlength=n_states * n_actions
    ).reshape(n_states, n_actions)
    vote_count = votes_per_action.sum(axis=1).astype(np.int64)
    top = votes_per_action.max(axis=1)
    n_at_top = (votes_per_action == top[:, None]).sum(axis=1)
    resolved = (top > 0) & (n_at_top == 1)
    action = np.where(resolved, votes_per_action.argmax(axis=1), UNSURE).astype(np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        agreement = np.where(vote_count > 0, top / np.maximum(vote_count, 1), np.nan)
    return DiscreteConsensus(
        action=action,
        label_count=label_count,
        vote_count=vote_count,
        agreement=agreement.astype(np.float64),
        resolved=resolved,
    )


def _grouped_median(
    group: NDArray[np.int64], values: NDArray[np.float64], n_groups: int
) -> NDArray[np.float64]:
    """Median of each column within each group; ``nan`` for empty groups.

    Sorting by (group, value) puts each group's values in a contiguous sorted run, so the
    median is read at fixed offsets. The loop is over columns (action dimensions, a handful),
    never over groups.
    """
    counts = np.bincount(group, minlength=n_groups)
    starts = np.cumsum(counts) - counts
    has = counts > 0
    low = (starts + (counts - 1) // 2)[has]
    high = (starts + counts // 2)[has]
    result = np.full((n_groups, values.shape[1]), np.nan)
    for column in range(values.shape[1]):
        order = np.lexsort((values[:, column], group))
        ordered = values[order, column]
        result[has, column] = 0.5 * (ordered[low] + ordered[high])
    return result


def continuous_consensus(
    state_index: ArrayLike,
    values: ArrayLike,
    unsure: ArrayLike,
    n_states: int,
    tolerance: ArrayLike,
) -> ContinuousConsensus:
    """Per-dimension median of the votes on each state, with its spread and agreement.

    The median is the robust centre (docs/references.md, "Consensus"): one careless label cannot
    move it past the other votes.

    Parameters
    ----------
    state_index : array-like of int, shape (n_labels,)
        State of each label, in ``range(n_states)``.
    values : array-like of float, shape (n_labels, n_dims)
        Labelled action vectors. Rows marked unsure are ignored and may hold ``nan``; all other
        rows must be finite.
    unsure : array-like of bool, shape (n_labels,)
        True where the answer was "unsure" (not a vote).
    n_states : int
        Number of states in the result.
    tolerance : array-like of float, shape (n_dims,)
        Per-dimension distance from the median within which a vote counts as agreeing, in the
        dimension's unit; must be >= 0.

    Returns
    -------
    ContinuousConsensus
        Arrays with a leading axis of n_states.
    """
    states = _check_state_index(state_index, n_states)
    vectors = np.asarray(values, dtype=np.float64)
    if vectors.ndim != 2 or vectors.shape[0] != states.shape[0]:
        raise ValueError(f"values must have shape ({states.shape[0]}, n_dims), got {vectors.shape}")
    unsure_mask = np.asarray(unsure)
    if unsure_mask.shape != states.shape or unsure_mask.dtype != np.bool_:
        raise ValueError(f"unsure must be a bool array of shape {states.shape}")
    tolerances = np.asarray(tolerance, dtype=np.float64)
    n_dims = vectors.shape[1]
    if tolerances.shape != (n_dims,) or not np.all(tolerances >= 0):
        raise ValueError(f"tolerance must be {n_dims} non-negative numbers, got {tolerances}")
    votes = ~unsure_mask
    if not np.all(np.isfinite(vectors[votes])):
        raise ValueError("values must be finite on every label not marked unsure")

    vote_states = states[votes]
    vote_values = vectors[votes]
    label_count = np.bincount(states, minlength=n_states).astype(np.int64)
    vote_count = np.bincount(vote_states, minlength=n_states).astype(np.int64)
    median = _grouped_median(vote_states, vote_values, n_states)
    deviation = np.abs(vote_values - median[vote_states])
    spread = _grouped_median(vote_states, deviation, n_states)
    within = np.all(deviation <= tolerances, axis=1)
    agreeing = np.bincount(vote_states, weights=within, minlength=n_states)
    with np.errstate(invalid="ignore", divide="ignore"):
        agreement = np.where(vote_count > 0, agreeing / np.maximum(vote_count, 1), np.nan)
    return ContinuousConsensus(
        median=median,
        spread=spread,
        label_count=label_count,
        vote_count=vote_count,
        agreement=agreement,
        resolved=vote_count > 0,
    )
