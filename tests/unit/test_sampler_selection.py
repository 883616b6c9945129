"""Budgeted selection: audit sample, time gap, spread and takeover boost.

No library implements these rules, so each fast path is compared with a slow, obvious
reference written here, plus invariance properties (docs/references.md, "Selection rules").
"""

import numpy as np
import pytest
from numpy.testing import assert_array_equal
from scipy.spatial.distance import cdist
from scipy.stats import chisquare

from expertloop.sampler import selection as sel
from expertloop.sampler import strata


def make_round(rng, n=3000, n_rollouts=40, step_s=0.1):
    """Rollouts of consecutive steps at step_s intervals, shuffled into one array."""
    rollout = rng.integers(0, n_rollouts, n)
    times = np.empty(n)
    for r in np.unique(rollout):
        where = np.flatnonzero(rollout == r)
        times[where] = np.arange(where.size) * step_s
    scores = rng.random(n)
    return scores, rollout, times


def slow_ranked(scores, rollout, times, budget, min_gap, taken):
    """Obvious reference: walk the score order, check every taken state in the same rollout."""
    order = sorted(range(len(scores)), key=lambda i: (-scores[i], i))
    taken = list(taken)
    chosen = []
    for i in order:
        if len(chosen) == budget:
            break
        if i in taken:
            continue
        if any(rollout[j] == rollout[i] and abs(times[j] - times[i]) < min_gap for j in taken):
            continue
        chosen.append(i)
        taken.append(i)
    return chosen


def assert_gap_respected(result, rollout, times, min_gap):
    """Every ranked pick is at least min_gap from every other pick in its rollout."""
    idx = result.indices
    for pos, i in enumerate(idx):
        if result.reasons[pos] != "ranked":
            continue
        others = np.delete(idx, pos)
        same = rollout[others] == rollout[i]
        assert np.all(np.abs(times[others][same] - times[i]) >= min_gap)


def test_matches_slow_reference_with_audit_and_gap():
    rng = np.random.default_rng(0)
    scores, rollout, times = make_round(rng, n=1500)
    result = sel.select(
        scores,
        rollout,
        times,
        120,
        min_gap=0.55,
        audit_fraction=0.1,
        rng=np.random.default_rng(1),
    )
    audit = result.indices[result.reasons == "audit"]
    ranked = result.indices[result.reasons == "ranked"]
    assert audit.size == 12 and ranked.size == 108  # budget and audit fraction exactly
    # input is not sorted by (rollout, time), so compare in canonical order
    assert_array_equal(ranked, slow_ranked(scores, rollout, times, 108, 0.55, audit))
    assert_gap_respected(result, rollout, times, 0.55)
    assert np.all(result.reasons[: result.n_audit] == "audit")
    assert len(set(result.indices.tolist())) == 120


def test_without_gap_or_audit_is_plain_top_b_with_index_tie_break():
    scores = np.array([0.5, 0.9, 0.5, 0.1, 0.9, 0.7])
    rollout = np.arange(6)
    times = np.zeros(6)
    result = sel.select(
        scores, rollout, times, 4, min_gap=0, audit_fraction=0, rng=np.random.default_rng(0)
    )
    # hand-checkable: descending, ties by index -> 1, 4, 5, 0
    assert_array_equal(result.indices, [1, 4, 5, 0])
    assert_array_equal(result.ranks, [1, 2, 3, 4])
    assert list(result.reasons) == ["ranked"] * 4


def test_gap_by_hand_boundary_is_allowed():
    # one rollout, steps 1 s apart, gap 2 s: |dt| < 2 is blocked, |dt| = 2 allowed
    times = np.arange(6.0)
    scores = np.array([0.1, 0.9, 0.8, 0.7, 0.2, 0.3])
    result = sel.select(
        scores, np.zeros(6), times, 3, min_gap=2.0, audit_fraction=0, rng=np.random.default_rng(0)
    )
    # hand-checkable: take t=1 (0.9); t=2 blocked; t=3 (0.7) allowed; then t=5 (0.3)
    assert_array_equal(result.indices, [1, 3, 5])
    assert result.notes == [] and result.final_gap == 2.0


def test_rollouts_are_independent_for_the_gap():
    times = np.zeros(4)
    rollout = np.array(["a", "b", "a", "c"])
    result = sel.select(
        np.array([4.0, 3, 2, 1]),
        rollout,
        times,
        3,
        min_gap=1.0,
        audit_fraction=0,
        rng=np.random.default_rng(0),
    )
    assert_array_equal(result.indices, [0, 1, 3])  # index 2 shares rollout "a" and time with 0


def test_audit_fraction_rounds_half_up_and_is_uniform():
    rng = np.random.default_rng(2)
    scores, rollout, times = make_round(rng, n=20)
    for budget, expected in [(5, 1), (10, 1), (15, 2), (25, 3), (4, 0)]:
        result = sel.select(
            scores,
            rollout,
            times,
            budget,
            min_gap=0,
            audit_fraction=0.1,
            rng=np.random.default_rng(0),
        )
        assert result.n_audit == expected  # floor(0.1 * budget + 0.5)
    # Uniformity: 4000 draws of a 5-state audit from 20 candidates; chi-square against equal
    # counts (reference: scipy.stats.chisquare). Scores must not influence the audit.
    counts = np.zeros(20)
    draw_rng = np.random.default_rng(123)
    for _ in range(4000):
        r = sel.select(scores, rollout, times, 5, min_gap=0, audit_fraction=1.0, rng=draw_rng)
        counts[r.indices] += 1
    assert counts.sum() == 20_000
    assert chisquare(counts).pvalue > 1e-3


def test_audit_ignores_scores():
    rng = np.random.default_rng(3)
    scores, rollout, times = make_round(rng, n=500)
    a = sel.select(scores, rollout, times, 50, min_gap=0.3, rng=np.random.default_rng(9))
    b = sel.select(-scores, rollout, times, 50, min_gap=0.3, rng=np.random.default_rng(9))
    assert_array_equal(a.indices[: a.n_audit], b.indices[: b.n_audit])


def test_same_seed_same_selection_different_seed_different_audit():
    rng = np.random.default_rng(4)
    scores, rollout, times = make_round(rng)
    a = sel.select(scores, rollout, times, 200, min_gap=0.5, rng=np.random.default_rng(7))
    b = sel.select(scores, rollout, times, 200, min_gap=0.5, rng=np.random.default_rng(7))
    c = sel.select(scores, rollout, times, 200, min_gap=0.5, rng=np.random.default_rng(8))
    assert_array_equal(a.indices, b.indices)
    assert list(a.reasons) == list(b.reasons)
    assert set(a.indices[: a.n_audit]) != set(c.indices[: c.n_audit])


@pytest.mark.parametrize("spread,stratify", [(False, False), (True, False), (False, True)])
def test_shuffling_candidates_does_not_change_the_states_chosen(spread, stratify):
    rng = np.random.default_rng(5)
    scores, rollout, times = make_round(rng, n=2000)
    features = rng.standard_normal((2000, 6))
    kwargs = dict(
        min_gap=0.35, audit_fraction=0.1, features=features, spread=spread, stratify=stratify
    )
    base = sel.select(scores, rollout, times, 100, rng=np.random.default_rng(11), **kwargs)
    perm = rng.permutation(2000)
    kwargs["features"] = features[perm]
    shuffled = sel.select(
        scores[perm], rollout[perm], times[perm], 100, rng=np.random.default_rng(11), **kwargs
    )
    assert_array_equal(perm[shuffled.indices], base.indices)  # mapped back through perm
    assert list(shuffled.reasons) == list(base.reasons)
    assert_array_equal(shuffled.ranks, base.ranks)


def test_budget_larger_than_candidates_takes_them_all_and_says_so():
    rng = np.random.default_rng(6)
    scores, rollout, times = make_round(rng, n=300, n_rollouts=5)
    everything = sel.select(scores, rollout, times, 1000, min_gap=0, rng=np.random.default_rng(0))
    assert sorted(everything.indices.tolist()) == list(range(300))
    assert everything.n_audit == 100  # 10% of the budget, capped at nothing here
    assert everything.notes == ["only 300 candidates for a budget of 1000: all of them were chosen"]
    gapped = sel.select(
        scores, rollout, times, 1000, min_gap=1.0, audit_fraction=0, rng=np.random.default_rng(0)
    )
    # first what the gap allows, in score order; then the rest once the gap is dropped
    expected = slow_ranked(scores, rollout, times, 1000, 1.0, [])
    assert len(expected) < 300
    assert_array_equal(gapped.indices[: len(expected)], expected)
    assert sorted(gapped.indices.tolist()) == list(range(300))
    assert gapped.final_gap == 0
    assert any(note.startswith("gap dropped to fill the budget") for note in gapped.notes)


def test_spread_is_farthest_first_over_the_gap_pool():
    rng = np.random.default_rng(7)
    scores, rollout, times = make_round(rng, n=800)
    features = rng.standard_normal((800, 3)) * [1.0, 5.0, 0.2]
    result = sel.select(
        scores,
        rollout,
        times,
        20,
        min_gap=0.3,
        audit_fraction=0,
        rng=np.random.default_rng(0),
        features=features,
        spread=True,
        spread_pool_factor=4,
    )
    pool = slow_ranked(scores, rollout, times, 80, 0.3, [])
    # slow reference: farthest-first from the top-scored pool member, standardised features
    z = (features - features.mean(axis=0)) / features.std(axis=0)
    dist = cdist(z[pool], z[pool])  # reference: scipy cdist
    picks = [0]
    for _ in range(19):
        picks.append(int(np.argmax(dist[:, picks].min(axis=1))))
    assert_array_equal(result.indices, np.array(pool)[picks])
    assert_gap_respected(result, rollout, times, 0.3)


def test_spread_covers_more_clusters_than_plain_ranking():
    # Scores favour cluster 0 (about 200 states); a pool of 30 x budget also holds the other
    # clusters, and farthest-first reaches all of them while plain ranking stays in one.
    rng = np.random.default_rng(8)
    label = rng.integers(0, 5, 1000)
    features = np.eye(5)[label] * 10 + rng.standard_normal((1000, 5)) * 0.1
    scores = rng.random(1000) + (label == 0) * 1.0
    rollout, times = np.arange(1000), np.zeros(1000)
    kwargs = dict(min_gap=0, audit_fraction=0, features=features, spread_pool_factor=30)
    plain = sel.select(scores, rollout, times, 10, rng=np.random.default_rng(0), **kwargs)
    spread = sel.select(
        scores, rollout, times, 10, rng=np.random.default_rng(0), spread=True, **kwargs
    )
    assert len(set(label[plain.indices])) == 1
    assert len(set(label[spread.indices])) == 5
    assert spread.indices[0] == plain.indices[0]  # seeded from the top-scored state


def lingering_round(rng):
    """A learner that spent most of the round in one stretch: 1000 states in a tight blob with
    middling scores, 30 outlying states with the highest scores, one rollout each."""
    blob = rng.standard_normal((1000, 4)) * 0.3
    outliers = rng.standard_normal((30, 4)) * 3.0 + 6.0
    features = np.concatenate([blob, outliers])
    scores = np.concatenate([0.2 + 0.4 * rng.random(1000), 0.9 + 0.1 * rng.random(30)])
    return scores, features, np.arange(1030), np.zeros(1030)


def slow_sainte_lague(scores, cells, seats):
    """Obvious reference: seat by seat, the cell with the highest total / (2 * seats so far + 1)
    takes its best state not yet taken (docs/references.md, "k-means strata")."""
    members = {c: sorted(np.flatnonzero(cells == c), key=lambda i: -scores[i]) for c in set(cells)}
    total = {c: scores[m].sum() for c, m in members.items()}
    taken = {c: 0 for c in members}
    chosen = []
    for _ in range(seats):
        c = max(members, key=lambda c: total[c] / (2 * taken[c] + 1) if members[c] else -1)
        chosen.append(members[c].pop(0))
        taken[c] += 1
    return chosen


def test_strata_give_the_bulk_of_the_round_its_share():
    rng = np.random.default_rng(31)
    scores, features, rollout, times = lingering_round(rng)
    kwargs = dict(min_gap=0, audit_fraction=0, features=features)
    plain = sel.select(scores, rollout, times, 20, rng=np.random.default_rng(0), **kwargs)
    split = sel.select(
        scores, rollout, times, 20, rng=np.random.default_rng(0), stratify=True, **kwargs
    )
    assert (plain.indices >= 1000).all()  # top-B: every pick an outlier
    # the blob holds 400 of the total score 428 (94%), split among most of the cells
    assert (split.indices < 1000).sum() >= 15
    # the same cells as select draws them (after its empty audit draw), then the slow rule
    draw = np.random.default_rng(0)
    draw.choice(1030, size=0, replace=False)
    z = (features - features.mean(axis=0)) / features.std(axis=0)
    cells = strata.strata(z, 20, draw)
    assert_array_equal(split.indices, slow_sainte_lague(scores, cells, 20))
    assert split.notes == []


def test_strata_keep_the_audit_sample_and_the_gap():
    rng = np.random.default_rng(32)
    scores, rollout, times = make_round(rng, n=2000)
    features = rng.standard_normal((2000, 3))
    kwargs = dict(min_gap=0.35, audit_fraction=0.2, features=features)
    plain = sel.select(scores, rollout, times, 60, rng=np.random.default_rng(4), **kwargs)
    split = sel.select(
        scores, rollout, times, 60, rng=np.random.default_rng(4), stratify=True, **kwargs
    )
    # the audit is drawn first from the same generator: the same states
    assert_array_equal(split.indices[: split.n_audit], plain.indices[: plain.n_audit])
    assert split.n_audit == 12 and len(split.indices) == 60
    assert_gap_respected(split, rollout, times, 0.35)
    assert split.final_gap == 0.35 and split.notes == []


def test_strata_step_aside_in_a_round_too_short_for_the_gap():
    rng = np.random.default_rng(33)
    scores, rollout, times = make_round(rng, n=300, n_rollouts=3)
    features = rng.standard_normal((300, 3))
    kwargs = dict(min_gap=40, audit_fraction=0, features=features)
    plain = sel.select(scores, rollout, times, 12, rng=np.random.default_rng(0), **kwargs)
    split = sel.select(
        scores, rollout, times, 12, rng=np.random.default_rng(0), stratify=True, **kwargs
    )
    assert_array_equal(split.indices, plain.indices)
    assert split.notes[0].endswith("ranked in score order, without strata")
    assert split.notes[1:] == plain.notes


def test_strata_need_features_and_non_negative_scores():
    with pytest.raises(ValueError, match="need features"):
        sel.select(
            [0.5, 0.2, 0.1],
            [0, 1, 2],
            [0, 0, 0],
            2,
            min_gap=0,
            rng=np.random.default_rng(0),
            stratify=True,
        )
    with pytest.raises(ValueError, match="non-negative"):
        sel.select(
            [0.5, -0.2, 0.1],
            [0, 1, 2],
            [0, 0, 0],
            3,
            min_gap=0,
            audit_fraction=0,
            rng=np.random.default_rng(0),
            features=np.eye(3),
            stratify=True,
        )


def test_takeover_boost_by_hand():
    # rollout a: expert from t=5 to 6, again at t=9; rollout b: no takeover
    rollout = np.array(["a"] * 10 + ["b"] * 3)
    times = np.concatenate([np.arange(10.0), np.arange(3.0)])
    mask = np.zeros(13, dtype=bool)
    mask[[5, 6, 9]] = True
    boost = sel.takeover_boost(rollout, times, mask, window_s=2.0, boost=0.3)
    expected = np.zeros(13)
    expected[[3, 4, 7, 8]] = 0.3  # 2 s before t=5 and before t=9; expert steps get 0
    assert_array_equal(boost, expected)


def slow_boost(rollout, times, mask, window_s, boost):
    """Obvious reference: find takeover starts per rollout, boost learner states before them."""
    out = np.zeros(len(times))
    for r in set(rollout.tolist()):
        where = sorted(np.flatnonzero(rollout == r), key=lambda i: times[i])
        starts = [
            times[i] for j, i in enumerate(where) if mask[i] and (j == 0 or not mask[where[j - 1]])
        ]
        for i in where:
            if not mask[i] and any(0 < t - times[i] <= window_s for t in starts):
                out[i] = boost
    return out


def test_takeover_boost_matches_slow_reference_and_is_order_free():
    rng = np.random.default_rng(9)
    _, rollout, times = make_round(rng, n=2000, n_rollouts=15)
    mask = rng.random(2000) < 0.05
    mask |= np.roll(mask, 1)  # takeovers of a few steps
    got = sel.takeover_boost(rollout, times, mask, window_s=0.45, boost=0.25)
    assert_array_equal(got, slow_boost(rollout, times, mask, 0.45, 0.25))
    assert got.max() == 0.25 and np.count_nonzero(got) > 50
    perm = rng.permutation(2000)
    shuffled = sel.takeover_boost(rollout[perm], times[perm], mask[perm], 0.45, 0.25)
    assert_array_equal(shuffled, got[perm])


def test_boost_changes_the_ranking():
    scores = np.array([0.9, 0.5, 0.4])
    result = sel.select(
        scores,
        np.arange(3),
        np.zeros(3),
        1,
        min_gap=0,
        audit_fraction=0,
        rng=np.random.default_rng(0),
        takeover_boost=np.array([0.0, 0.0, 0.6]),
    )
    assert_array_equal(result.indices, [2])
    assert result.effective_scores[2] == pytest.approx(1.0)


def test_invalid_parameters_are_refused():
    s, r, t = np.ones(3), np.zeros(3), np.arange(3.0)
    with pytest.raises(ValueError, match="budget"):
        sel.select(s, r, t, -1, min_gap=0, rng=np.random.default_rng(0))
    with pytest.raises(ValueError, match="audit_fraction"):
        sel.select(s, r, t, 1, min_gap=0, audit_fraction=1.5, rng=np.random.default_rng(0))
    with pytest.raises(ValueError, match="features"):
        sel.select(s, r, t, 1, min_gap=0, spread=True, rng=np.random.default_rng(0))
    with pytest.raises(ValueError, match="same length"):
        sel.select(s, r[:2], t, 1, min_gap=0, rng=np.random.default_rng(0))


def test_gap_rule_holds_at_float_boundaries():
    # Times 0.1 * k with gap 0.3: 0.9 - 0.6000000000000001 < 0.3 in float64, while
    # 0.6000000000000001 <= 0.9 - 0.3; the rule as stated (|t - t_taken| < gap) must win.
    rng = np.random.default_rng(10)
    scores, rollout, times = make_round(rng, n=1500, n_rollouts=10)
    result = sel.select(
        scores, rollout, times, 400, min_gap=0.3, audit_fraction=0, rng=np.random.default_rng(0)
    )
    # the gap leaves room for fewer than 400: those come first, exactly as the rule says
    expected = slow_ranked(scores, rollout, times, 400, 0.3, [])
    assert len(expected) < 400
    assert_array_equal(result.indices[: len(expected)], expected)
    assert result.indices.size == 400


def slow_ladder(scores, rollout, positions, budget, gaps):
    """Obvious reference for the relaxation: fill with each gap in turn, keeping earlier picks."""
    taken = []
    for gap in gaps:
        more = slow_ranked(scores, rollout, positions, budget - len(taken), gap, taken)
        taken.extend(more)
        if len(taken) == budget:
            return taken, gap
    return taken, gaps[-1]


def test_relaxed_gaps_halve_in_whole_steps_then_drop():
    assert sel.relaxed_gaps(10) == [10, 5, 2, 0]
    assert sel.relaxed_gaps(50) == [50, 25, 12, 6, 3, 0]
    assert sel.relaxed_gaps(3) == [3, 0]
    assert sel.relaxed_gaps(0.3) == [0.3, 0]
    assert sel.relaxed_gaps(0) == [0]


@pytest.mark.parametrize("seed,gap,budget", [(0, 10, 120), (1, 25, 60), (2, 4, 290)])
def test_budget_is_spent_by_relaxing_the_gap_step_by_step(seed, gap, budget):
    rng = np.random.default_rng(seed)
    scores, rollout, positions = make_round(rng, n=300, n_rollouts=6, step_s=1.0)
    result = sel.select(scores, rollout, positions, budget, min_gap=gap, audit_fraction=0, rng=rng)
    expected, final_gap = slow_ladder(scores, rollout, positions, budget, sel.relaxed_gaps(gap))
    assert_array_equal(result.indices, expected)
    assert result.indices.size == budget == np.unique(result.indices).size
    assert result.final_gap == final_gap
    assert len(result.notes) == 1 and "to fill the budget" in result.notes[0]


def test_relaxation_respects_audit_picks_and_says_how_far_it_went():
    # one rollout of 30 steps, best scores clustered at steps 10..14; gap 20 with a budget of 6
    positions = np.arange(30.0)
    scores = np.where((positions >= 10) & (positions < 15), 1.0 + positions / 100, positions / 100)
    result = sel.select(
        scores,
        np.zeros(30),
        positions,
        6,
        min_gap=20,
        audit_fraction=0,
        rng=np.random.default_rng(0),
    )
    # gap 20 allows step 14 and then nothing within 20 steps: only 14 (and nothing else).
    # 10 allows 14, 29 (best far enough) and 4; 5 adds 19 and 24 and 9; six picks
    assert sorted(result.indices.tolist()) == [4, 9, 14, 19, 24, 29]
    assert result.final_gap == 5
    assert result.notes == [
        "gap relaxed to 5 steps to fill the budget: 20 steps left room for 1 of 6 ranked "
        "states; 5 more were taken"
    ]


def test_rollout_positions_count_recorded_steps():
    rollout = np.array(["b", "a", "a", "b", "a"])
    step_index = np.array([10, 5, 0, 0, 15])
    assert sel.rollout_positions(rollout, step_index).tolist() == [1, 1, 0, 0, 2]
