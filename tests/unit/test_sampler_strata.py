"""Strata for the ranked part of a selection: k-means cells (scipy's kmeans2) against
scikit-learn's KMeans partition, and the order in which cells are visited (docs/references.md,
"k-means strata")."""

import numpy as np
import pytest
from numpy.testing import assert_array_equal
from sklearn.cluster import KMeans

from expertloop.sampler import strata


def blobs(rng, n_per=200, centres=((0, 0, 0), (6, 0, 0), (0, 6, 0), (0, 0, 6), (6, 6, 6))):
    points = np.concatenate([rng.standard_normal((n_per, 3)) + c for c in centres])
    return points[rng.permutation(len(points))]


def test_strata_find_separated_blobs_and_are_seeded():
    rng = np.random.default_rng(22)
    points = blobs(rng)
    # reference: sklearn.cluster.KMeans on the same points
    truth = KMeans(5, n_init=10, random_state=0).fit(points).labels_
    cells = strata.strata(points, 5, np.random.default_rng(1))
    # the same partition up to the cells' numbering
    pairs = {(int(a), int(b)) for a, b in zip(cells, truth, strict=True)}
    assert len(pairs) == 5
    assert_array_equal(cells, strata.strata(points, 5, np.random.default_rng(1)))


def test_strata_cap_at_distinct_points_and_handle_one_cell():
    same = np.zeros((50, 4))
    assert_array_equal(strata.strata(same, 10, np.random.default_rng(0)), np.zeros(50))
    two = np.repeat([[0.0, 0.0], [1.0, 1.0]], 20, axis=0)
    cells = strata.strata(two, 10, np.random.default_rng(0))
    assert len(set(cells[:20].tolist())) == 1 and len(set(cells[20:].tolist())) == 1
    assert cells[0] != cells[-1]
    assert strata.strata(np.zeros((0, 3)), 5, np.random.default_rng(0)).shape == (0,)


def test_stratified_order_apportions_like_sainte_lague():
    # The highest-averages worked example (from memory; common in descriptions of the
    # Sainte-Lague method): votes 53,000 / 24,000 / 23,000 and 7 seats give 3 / 2 / 2 (D'Hondt
    # would give 4 / 2 / 1). Here each cell's total score plays the votes and the first 7
    # states of the order the seats.
    cells = np.repeat([0, 1, 2], 10)
    scores = np.zeros(30)
    scores[[0, 10, 20]] = [53_000.0, 24_000.0, 23_000.0]
    order = strata.stratified_order(scores, cells)
    assert np.bincount(cells[order[:7]], minlength=3).tolist() == [3, 2, 2]
    # every prefix is a Sainte-Lague apportionment: by hand for 1 to 5 seats
    assert [np.bincount(cells[order[:k]], minlength=3).tolist() for k in range(1, 6)] == [
        [1, 0, 0],
        [1, 1, 0],
        [1, 1, 1],
        [2, 1, 1],
        [3, 1, 1],
    ]


def test_stratified_order_by_hand():
    # cells 0: scores 0.9, 0.2 (total 1.1); 1: 0.5, 0.4, 0.1 (1.0); 2: 0.3 (0.3)
    scores = np.array([0.9, 0.5, 0.2, 0.4, 0.3, 0.1])
    cells = np.array([0, 1, 0, 1, 2, 1])
    # quotients: 1.1, 1.0, 1.1/3, 1.0/3, 0.3, 1.0/5, in that order
    assert strata.stratified_order(scores, cells).tolist() == [0, 1, 2, 3, 4, 5]
    # a heavy cell takes its second state before a light cell its first
    heavy = strata.stratified_order([0.9, 0.9, 0.9, 0.9, 0.95], [0, 0, 0, 0, 1])
    assert heavy.tolist() == [0, 1, 4, 2, 3]
    # ties go to the earlier position
    assert strata.stratified_order([0.5, 0.5], [1, 0]).tolist() == [0, 1]


def test_stratified_order_refuses_negative_scores():
    with pytest.raises(ValueError, match="non-negative"):
        strata.stratified_order([0.5, -0.1], [0, 1])
