"""Consensus per state: hand-checkable votes, numpy/scipy references, label-order invariance."""

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from scipy.stats import median_abs_deviation

from expertloop.shared.consensus import continuous_consensus, discrete_consensus, one_vote_each


def test_majority_tie_unsure_and_empty_states_by_hand() -> None:
    # Hand-checked cases (common practice for majority vote):
    # state 0: votes 2,2,1 -> action 2 wins with 2/3.
    # state 1: votes 0,1 -> tie, unresolved, tied share 1/2.
    # state 2: votes 1 and two unsure -> action 1 wins 1/1; three answers, one vote.
    # state 3: only unsure -> unresolved, no votes.
    # state 4: no labels at all -> unresolved.
    # state 5: votes 0,0,1,1,2 -> tie between 0 and 1 even though 2 also got a vote.
    state = np.array([0, 0, 0, 1, 1, 2, 2, 2, 3, 5, 5, 5, 5, 5])
    action = np.array([2, 2, 1, 0, 1, -1, 1, -1, -1, 0, 0, 1, 1, 2])
    result = discrete_consensus(state, action, n_states=6, n_actions=3)
    assert_array_equal(result.action, [2, -1, 1, -1, -1, -1])
    assert_array_equal(result.resolved, [True, False, True, False, False, False])
    assert_array_equal(result.label_count, [3, 2, 3, 1, 0, 5])
    assert_array_equal(result.vote_count, [3, 2, 1, 0, 0, 5])
    assert_allclose(result.agreement, [2 / 3, 1 / 2, 1.0, np.nan, np.nan, 2 / 5])


def test_unsure_answers_do_not_vote() -> None:
    # Two unsure answers must not outvote one real vote (docs/references.md, "Consensus":
    # unsure is an answer, not a vote).
    with_unsure = discrete_consensus([0, 0, 0], [-1, -1, 2], n_states=1, n_actions=3)
    without = discrete_consensus([0], [2], n_states=1, n_actions=3)
    assert with_unsure.action[0] == without.action[0] == 2
    assert with_unsure.agreement[0] == without.agreement[0] == 1.0
    assert with_unsure.label_count[0] == 3 and with_unsure.vote_count[0] == 1


def test_discrete_matches_loop_reference_and_is_order_invariant() -> None:
    # Slow, obvious reference: count votes per state with a Python dict (common practice).
    rng = np.random.default_rng(7)
    n_states, n_actions, n_labels = 200, 4, 900
    state = rng.integers(0, n_states, n_labels)
    action = rng.integers(-1, n_actions, n_labels)
    result = discrete_consensus(state, action, n_states, n_actions)
    for s in range(n_states):
        votes = action[(state == s) & (action >= 0)]
        counts = np.bincount(votes, minlength=n_actions)
        winners = np.flatnonzero(counts == counts.max())
        expected = winners[0] if counts.max() > 0 and len(winners) == 1 else -1
        assert result.action[s] == expected
    order = rng.permutation(n_labels)
    shuffled = discrete_consensus(state[order], action[order], n_states, n_actions)
    for field in ("action", "label_count", "vote_count", "agreement", "resolved"):
        assert_array_equal(getattr(shuffled, field), getattr(result, field))


def test_discrete_rejects_out_of_range_labels() -> None:
    with pytest.raises(ValueError, match="action_index"):
        discrete_consensus([0], [3], n_states=1, n_actions=3)
    with pytest.raises(ValueError, match="state_index"):
        discrete_consensus([2], [0], n_states=2, n_actions=3)


def _random_continuous(seed: int):
    rng = np.random.default_rng(seed)
    n_states, n_labels, n_dims = 60, 400, 3
    state = rng.integers(0, n_states - 5, n_labels)  # last five states get no labels
    values = rng.normal(size=(n_labels, n_dims)) * [1.0, 0.1, 5.0]
    unsure = rng.random(n_labels) < 0.15
    values[unsure] = np.nan  # unsure rows carry no value; they must be ignored
    return state, values, unsure, n_states


def test_median_and_spread_match_numpy_and_scipy_per_state() -> None:
    # References: numpy.median and scipy.stats.median_abs_deviation (scale=1.0, unscaled MAD).
    state, values, unsure, n_states = _random_continuous(11)
    tolerance = np.array([0.5, 0.05, 2.0])
    result = continuous_consensus(state, values, unsure, n_states, tolerance)
    for s in range(n_states):
        votes = values[(state == s) & ~unsure]
        assert result.vote_count[s] == len(votes)
        assert result.label_count[s] == np.sum(state == s)
        if len(votes) == 0:
            assert not result.resolved[s]
            assert np.all(np.isnan(result.median[s])) and np.isnan(result.agreement[s])
            continue
        assert result.resolved[s]
        assert_allclose(result.median[s], np.median(votes, axis=0), rtol=0, atol=0)
        assert_allclose(result.spread[s], median_abs_deviation(votes, axis=0), rtol=1e-15)
        within = np.all(np.abs(votes - np.median(votes, axis=0)) <= tolerance, axis=1)
        assert result.agreement[s] == pytest.approx(within.mean())
    assert np.all(~result.resolved[-5:])


def test_continuous_by_hand() -> None:
    # Hand-checked: votes 1.0, 1.2, 3.0 -> median 1.2, |dev| 0.2, 0, 1.8 -> MAD 0.2;
    # with tolerance 0.25, two of three votes agree. The unsure row (value 100) is ignored.
    result = continuous_consensus(
        [0, 0, 0, 0], [[1.0], [1.2], [3.0], [100.0]], [False, False, False, True], 1, [0.25]
    )
    assert result.median[0, 0] == pytest.approx(1.2)
    assert result.spread[0, 0] == pytest.approx(0.2)
    assert result.agreement[0] == pytest.approx(2 / 3)
    assert result.label_count[0] == 4 and result.vote_count[0] == 3


def test_continuous_is_invariant_to_label_order() -> None:
    state, values, unsure, n_states = _random_continuous(12)
    tolerance = np.array([0.5, 0.05, 2.0])
    result = continuous_consensus(state, values, unsure, n_states, tolerance)
    order = np.random.default_rng(3).permutation(len(state))
    shuffled = continuous_consensus(state[order], values[order], unsure[order], n_states, tolerance)
    for field in ("median", "spread", "label_count", "vote_count", "agreement", "resolved"):
        assert_array_equal(getattr(shuffled, field), getattr(result, field))


def test_continuous_rejects_nan_votes() -> None:
    with pytest.raises(ValueError, match="finite"):
        continuous_consensus([0], [[np.nan]], [False], 1, [0.1])


def test_one_vote_each_keeps_a_direct_answer_else_the_newest_span_copy() -> None:
    # Hand-checked (one vote per annotator and state, README "Training sets"): labels in id order.
    # state 7: annotator 1 answered directly (id 0), then two span copies (ids 1, 2): the direct
    #          answer votes; annotator 2's single span copy (id 3) votes.
    # state 8: annotator 1 has only span copies (ids 4, 6): the newest (id 6) votes; annotator 3's
    #          direct answer (id 5) votes.
    # state 9: one label: it votes.
    state = [7, 7, 7, 7, 8, 8, 8, 9]
    annotator = [1, 1, 1, 2, 1, 3, 1, 1]
    span = [False, True, True, True, True, False, True, True]
    assert_array_equal(
        one_vote_each(state, annotator, span),
        [True, False, False, True, False, True, True, True],
    )
    assert one_vote_each([], [], []).shape == (0,)


def test_one_vote_each_matches_a_loop_reference() -> None:
    # Slow, obvious reference: walk the labels in id order keeping, per (state, annotator), the
    # latest label, except that a span copy never replaces a direct answer (the service stores
    # at most one standing direct answer per annotator and state; here the latest one votes).
    rng = np.random.default_rng(11)
    n = 400
    state = rng.integers(0, 30, n)
    annotator = rng.integers(0, 4, n)
    span = rng.random(n) < 0.6
    chosen: dict[tuple[int, int], int] = {}
    for i in range(n):
        key = (int(state[i]), int(annotator[i]))
        held = chosen.get(key)
        if held is None or span[held] or not span[i]:
            chosen[key] = i
    expected = np.zeros(n, dtype=bool)
    expected[list(chosen.values())] = True
    assert_array_equal(one_vote_each(state, annotator, span), expected)
