"""kNN novelty checked against scikit-learn (docs/references.md, "kNN novelty")."""

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from sklearn.neighbors import NearestNeighbors

from expertloop.sampler import novelty as nv
from tests.helpers import recall_at_k


def references_data():
    # docs/references.md, "kNN novelty": rng=default_rng(2024); R (5000, 16), then Q (1000, 16)
    rng = np.random.default_rng(2024)
    reference = rng.standard_normal((5000, 16))
    queries = rng.standard_normal((1000, 16))
    return queries, reference


def clustered(rng, n, dim=32, n_clusters=30, latent=6):
    """Mixture of low-rank Gaussian clusters: low intrinsic dimension, like robot states."""
    centres = rng.standard_normal((n_clusters, dim)) * 4
    bases = rng.standard_normal((n_clusters, latent, dim))
    label = rng.integers(0, n_clusters, n)
    z = rng.standard_normal((n, latent))
    x = centres[label] + np.einsum("nl,nld->nd", z, bases[label])
    return (x + 0.1 * rng.standard_normal((n, dim))).astype(np.float32)


@pytest.mark.parametrize("chunk", [1, 7, 256, None])
def test_exact_matches_sklearn_brute_on_references_data(chunk):
    queries, reference = references_data()
    dist, idx = nv.exact_knn_distances(queries, reference, 5, chunk=chunk)
    # reference: sklearn NearestNeighbors(algorithm="brute"); docs/references.md, "kNN novelty"
    # reports max |delta d| 2.2e-15 for a float64 chunked search with identical indices
    ref_dist, ref_idx = (
        NearestNeighbors(n_neighbors=5, algorithm="brute").fit(reference).kneighbors(queries)
    )
    assert np.max(np.abs(dist - ref_dist)) < 1e-13
    assert_array_equal(idx, ref_idx)
    # docs/references.md, "kNN novelty": mean 5-NN distance of the first 3 queries
    assert_allclose(dist[:3].mean(axis=1), [2.5163197, 2.59158513, 2.60205255], atol=5e-9)


def test_exact_over_many_reference_blocks(monkeypatch):
    # Force tiny reference blocks so the cross-block merge runs; result must not change.
    queries, reference = references_data()
    monkeypatch.setattr(nv, "_REFERENCE_BLOCK", 97)
    dist, idx = nv.exact_knn_distances(queries[:200], reference, 5)
    ref_dist, ref_idx = (
        NearestNeighbors(n_neighbors=5, algorithm="brute").fit(reference).kneighbors(queries[:200])
    )  # reference: sklearn brute
    assert np.max(np.abs(dist - ref_dist)) < 1e-13
    assert_array_equal(idx, ref_idx)


def test_exact_ties_go_to_smaller_index():
    # Integer grid data has many exactly tied distances; compare with an obvious full sort.
    rng = np.random.default_rng(9)
    reference = rng.integers(0, 3, (2000, 3)).astype(float)
    queries = rng.integers(0, 3, (100, 3)).astype(float)
    dist, idx = nv.exact_knn_distances(queries, reference, 7)
    full = np.sqrt(((queries[:, None, :] - reference[None]) ** 2).sum(axis=2))
    positions = np.broadcast_to(np.arange(reference.shape[0]), full.shape)
    order = np.lexsort((positions, full), axis=1)[:, :7]  # common practice: stable tie-break
    assert_array_equal(idx, order)
    assert_allclose(dist, np.take_along_axis(full, order, axis=1), atol=1e-7)


def test_exact_survives_cancellation():
    # docs/references.md, "kNN novelty", cancellation: R' = 0.01 R + 1000, true 1-NN distance
    # about 0.027, reference kd_tree in float64
    queries, reference = references_data()
    r_shift, q_shift = 0.01 * reference + 1000, 0.01 * queries + 1000
    ref_dist, ref_idx = (
        NearestNeighbors(n_neighbors=1, algorithm="kd_tree").fit(r_shift).kneighbors(q_shift)
    )
    assert ref_dist.mean() == pytest.approx(0.027, abs=1e-3)
    dist, idx = nv.exact_knn_distances(q_shift, r_shift, 1)
    # same section: the float64 uncentred expansion errs by 2.7e-7; centring first removes it
    assert np.max(np.abs(dist - ref_dist)) < 1e-9
    assert_array_equal(idx, ref_idx)
    # The check can fail: the naive float32 expansion on the same data is badly wrong
    # (same section: max error 0.046, every 1-NN index wrong).
    r32, q32 = r_shift.astype(np.float32), q_shift.astype(np.float32)
    naive = (q32**2).sum(1)[:, None] + (r32**2).sum(1)[None, :] - 2 * q32 @ r32.T
    naive_dist = np.sqrt(np.maximum(naive.min(axis=1), 0))
    assert np.max(np.abs(naive_dist - ref_dist[:, 0])) > 0.01


def test_novelty_equals_standardised_sklearn_mean_distance():
    rng = np.random.default_rng(4)
    training = rng.normal(5.0, [1.0, 10.0, 0.1, 3.0], size=(800, 4))
    candidates = rng.normal(5.0, [2.0, 10.0, 0.3, 3.0], size=(300, 4))
    got = nv.novelty(candidates, training, k=10)
    # reference: sklearn StandardScaler semantics (ddof=0) + NearestNeighbors brute
    mean, std = training.mean(axis=0), training.std(axis=0)
    nn = NearestNeighbors(n_neighbors=10, algorithm="brute").fit((training - mean) / std)
    ref, _ = nn.kneighbors((candidates - mean) / std)
    assert_allclose(got, ref.mean(axis=1), rtol=1e-12)


def test_novelty_invariant_to_feature_scaling():
    # invariance (docs/references.md, "kNN novelty": standardised features): scaling a feature
    # by a constant does not change novelty
    rng = np.random.default_rng(8)
    training = rng.standard_normal((500, 5))
    candidates = rng.standard_normal((100, 5)) * 1.5
    base = nv.novelty(candidates, training, k=5)
    scale = np.array([1.0, 1000.0, 1e-3, 7.0, 1.0])
    assert_allclose(nv.novelty(candidates * scale, training * scale, k=5), base, rtol=1e-9)


def test_standardiser_zero_spread_feature_passes_unscaled():
    training = np.array([[1.0, 3.0], [3.0, 3.0], [5.0, 3.0]])
    s = nv.Standardiser.fit(training)
    # hand-checkable: mean [3, 3], population std [sqrt(8/3), 0 -> 1]
    assert_allclose(s.mean, [3.0, 3.0])
    assert_allclose(s.scale, [np.sqrt(8 / 3), 1.0])
    assert_allclose(s.transform([[3.0, 4.0]]), [[0.0, 1.0]])


def test_novelty_edge_cases():
    rng = np.random.default_rng(1)
    training = rng.standard_normal((3, 2))
    candidates = rng.standard_normal((4, 2))
    with pytest.raises(ValueError, match="empty training set"):
        nv.novelty(candidates, np.empty((0, 2)))
    # k larger than the training set: all 3 training states are used
    got = nv.novelty(candidates, training, k=10)
    s = nv.Standardiser.fit(training)
    full = np.linalg.norm(s.transform(candidates)[:, None] - s.transform(training)[None], axis=2)
    assert_allclose(got, full.mean(axis=1), rtol=1e-12)  # common practice: mean of all distances
    with pytest.raises(ValueError, match="features"):
        nv.novelty(candidates, rng.standard_normal((5, 3)))
    with pytest.raises(ValueError, match="NaN"):
        nv.novelty(np.full((1, 2), np.nan), training)


def test_recall_at_k_by_hand():
    approx = np.array([[1, 2, 3], [4, 5, 6]])
    exact = np.array([[3, 2, 9], [6, 5, 4]])
    # hand-checkable: 2 of 3 found in row 0, 3 of 3 in row 1 -> 5/6
    assert recall_at_k(approx, exact) == pytest.approx(5 / 6)


def test_approximate_recall_on_clustered_data():
    # docs/references.md, "Approximate nearest-neighbour search": IVF recall@10 0.997 on
    # clustered data; we require >= 0.95.
    # Measured here: 0.974 (20k training states, 2k queries, 32 features; 0.981 with sqrt(N) lists).
    rng = np.random.default_rng(5)
    training = clustered(rng, 20_000)
    queries = clustered(rng, 2_000)
    s = nv.Standardiser.fit(training)
    t32, q32 = s.transform(training, np.float32), s.transform(queries, np.float32)
    approx_dist, approx_idx = nv.approximate_knn_distances(
        q32, t32, 10, rng=np.random.default_rng(0)
    )
    exact_dist, exact_idx = nv.exact_knn_distances(q32, t32, 10)
    assert recall_at_k(approx_idx, exact_idx) >= 0.95
    # Distances of the neighbours found are true distances (IVF-Flat), so never below exact.
    assert np.all(approx_dist.mean(axis=1) >= exact_dist.mean(axis=1) - 1e-4)


def test_novelty_switches_to_index_above_threshold_and_stays_close():
    rng = np.random.default_rng(6)
    training = clustered(rng, 8_000, dim=16)
    candidates = clustered(rng, 1_000, dim=16)
    exact = nv.novelty(candidates, training, k=10)
    approx = nv.novelty(candidates, training, k=10, exact_threshold=1000)
    assert not np.array_equal(exact, approx)  # the approximate path really ran
    # common practice: approximate novelty is checked by rank agreement with exact
    from scipy.stats import spearmanr

    assert spearmanr(exact, approx).statistic > 0.98
    again = nv.novelty(candidates, training, k=10, exact_threshold=1000)
    assert_array_equal(approx, again)  # default rng is seeded: reproducible


@pytest.mark.parametrize(
    ("n_candidates", "n_training", "exact"),
    [
        # bench/rank.py's series: 200k candidates against 10k, 100k and 1M training states,
        # where the index was the faster (README, "Benchmarks", "Ranking")
        (200_000, 10_000, False),
        (200_000, 100_000, False),
        (200_000, 1_000_000, False),
        (20_000, 100_000, False),
        # the measured grid behind EXACT_MAX_CANDIDATES: exact was the faster at 500
        # candidates against 10k to 100k states, the index from 2,000 candidates on (where
        # the search is larger than EXACT_ALWAYS_PAIRS)
        (500, 100_000, True),
        (1_000, 10_000, True),
        (6_000, 10_000, False),
        (2_000, 100_000, False),
        (500, 100_001, False),  # past the float64 copy's bound
        # searches of at most 5e7 pairs (a third of a second) stay exact whatever their shape
        (2_000, 10_000, True),
        (12_000, 2_500, True),
        (50_000, 1_000, True),
        (50_001, 1_000, False),
    ],
)
def test_search_is_chosen_by_sizes(n_candidates, n_training, exact):
    assert nv.exact_search_fits(n_candidates, n_training) is exact


def test_recorded_rankings_rerun_with_the_search_choice_they_were_made_with():
    # A ranking job must rerun to the same selection: jobs recorded before the measured rule
    # (no search_by_candidates in their params) keep the pair-count rule. 12,000 candidates
    # against 5,000 states: 6e7 pairs searched exactly before; the measured rule builds the
    # index.
    from dataclasses import replace

    from expertloop.sampler.candidates import RoundSteps
    from expertloop.sampler.rank import RankParams, rank_round

    rng = np.random.default_rng(13)
    training = clustered(rng, 5_000, dim=8)
    n = 12_000
    none = np.zeros(n, dtype=bool)
    steps = RoundSteps(
        step_id=np.arange(n),
        rollout_id=np.arange(n) // 100,
        step_index=np.arange(n) % 100,
        time_s=(np.arange(n) % 100) * 0.1,
        expert=none,
        features=clustered(rng, n, dim=8),
        probs=None,
        has_probs=none,
        ensemble=None,
        has_ensemble=none,
        std=None,
        has_std=none,
    )
    recorded = RankParams(
        **{  # the params of a job recorded before the field existed
            "budget": 20,
            "seed": 3,
            "min_gap_steps": 0,
            "audit_fraction": 0.0,
            "spread": False,
            "uncertainty_weight": 0.5,
            "novelty_weight": 0.5,
            "novelty_k": 5,
            "takeover_window_s": 0.0,
            "takeover_boost": 0.0,
        }
    )
    bounds = np.zeros(1), np.ones(1)
    before = rank_round(
        steps, training, kind="discrete", low=bounds[0], high=bounds[1], params=recorded
    )
    now = rank_round(
        steps,
        training,
        kind="discrete",
        low=bounds[0],
        high=bounds[1],
        params=replace(recorded, search_by_candidates=True),
    )
    assert before.methods["novelty"] == "exact"
    assert now.methods["novelty"] == "approximate (faiss IVF)"
    # reference: the exact search, itself checked against scikit-learn above
    exact = nv.novelty(steps.features, training, k=5, exact_threshold=10**9)
    assert_array_equal(before.novelty, exact)
    assert not np.array_equal(now.novelty, exact)


def test_approximate_falls_back_to_exact_when_lists_are_short():
    # 1 point per list and nprobe 1 leave most queries with fewer than k results.
    rng = np.random.default_rng(3)
    reference = rng.standard_normal((64, 4)).astype(np.float32)
    queries = rng.standard_normal((20, 4)).astype(np.float32)
    dist, idx = nv.approximate_knn_distances(
        queries, reference, 5, rng=np.random.default_rng(0), nlist=64, nprobe=1
    )
    ref_dist, _ = nv.exact_knn_distances(queries, reference, 5)
    assert np.all(idx >= 0)
    assert_allclose(dist, ref_dist, atol=1e-5)


@pytest.mark.parametrize("exact_threshold", [100_000, 1_000], ids=["exact", "approximate"])
def test_novelty_reports_progress_in_chunks_without_changing_the_result(
    monkeypatch, exact_threshold
):
    """A long search must keep reporting (the ranking job renews its lease on progress)."""
    monkeypatch.setattr(nv, "_FAISS_CHUNK", 700)  # several add and search calls
    monkeypatch.setattr(nv, "_BLOCK_BYTES", 8 * 3_072 * 300)  # exact: tiles of ~300 queries
    rng = np.random.default_rng(8)
    training = clustered(rng, 3_000, dim=8)
    candidates = clustered(rng, 2_000, dim=8)
    seen: list[float] = []
    reported = nv.novelty(
        candidates, training, k=5, exact_threshold=exact_threshold, progress=seen.append
    )
    silent = nv.novelty(candidates, training, k=5, exact_threshold=exact_threshold)
    assert_array_equal(reported, silent)
    assert len(seen) >= 4 and seen == sorted(seen)
    assert 0 < seen[0] < 1 and seen[-1] == pytest.approx(1.0)
