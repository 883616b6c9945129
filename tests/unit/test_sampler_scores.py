"""Uncertainty scores checked against published values and scipy (sources: docs/references.md)."""

import numpy as np
import pytest
import scipy.stats
from numpy.testing import assert_allclose
from scipy.stats import rankdata

from expertloop.sampler import scores

# docs/references.md, "Least confidence and margin" (Settles 2009, from memory; hand-checkable).
TABLE_P = np.array([[0.7, 0.2, 0.1], [0.5, 0.25, 0.25], [0.4, 0.4, 0.2]])
TABLE_LC = [0.30000000000000004, 0.5, 0.6]
TABLE_MARGIN = [0.49999999999999994, 0.25, 0.0]
TABLE_H = [0.8018185525433373, 1.0397207708399179, 1.0549201679861442]

# docs/references.md, "BALD mutual information": constructed ensemble (reference: scipy).
BALD_P = np.array([[0.7, 0.2, 0.1], [0.1, 0.8, 0.1], [0.3, 0.3, 0.4]])


def test_entropy_reference_values():
    # docs/references.md, "Shannon entropy" (Shannon 1948; values from scipy.stats.entropy)
    assert scores.entropy([[0.5, 0.5]])[0] == pytest.approx(0.6931471805599453, abs=1e-15)
    assert scores.entropy([[1 / 7] * 7])[0] == pytest.approx(1.945910149055314, abs=1e-15)
    assert_allclose(scores.entropy(TABLE_P), TABLE_H, rtol=0, atol=1e-15)
    # docs/references.md, "Shannon entropy": rows need axis=1 in scipy -> [1.0397, 1.0986]
    assert_allclose(
        scores.entropy([[0.5, 0.25, 0.25], [1 / 3] * 3]), [1.03972077, 1.09861229], atol=1e-8
    )


def test_entropy_matches_scipy_and_is_safe_for_zeros():
    rng = np.random.default_rng(7)
    p = rng.dirichlet(np.full(5, 0.3), size=200)
    # exact zeros: the naive formula would give nan (docs/references.md, "Shannon entropy")
    p[:20, 0] = 0.0
    p /= p.sum(axis=1, keepdims=True)
    # reference: scipy.stats.entropy along axis=1
    assert_allclose(scores.entropy(p), scipy.stats.entropy(p, axis=1), rtol=1e-12)
    assert np.all(np.isfinite(scores.entropy([[1.0, 0.0, 0.0]])))
    assert scores.entropy([[1.0, 0.0, 0.0]])[0] == 0.0


def test_probability_rows_not_summing_to_one_are_refused():
    # common practice: logits or raw counts passed as probabilities are a caller error
    with pytest.raises(ValueError, match="sums to"):
        scores.entropy([[2.0, 1.0, 1.0]])
    with pytest.raises(ValueError, match="negative"):
        scores.entropy([[1.2, -0.2]])
    with pytest.raises(ValueError, match="NaN"):
        scores.bald(np.full((1, 2, 2), np.nan))


def test_least_confidence_and_margin_table():
    # docs/references.md, "Least confidence and margin" (Settles 2009 section 3.1, from memory)
    assert_allclose(scores.least_confidence(TABLE_P), TABLE_LC, rtol=0, atol=1e-15)
    assert_allclose(scores.margin(TABLE_P), TABLE_MARGIN, rtol=0, atol=1e-15)
    assert_allclose(
        scores.margin_uncertainty(TABLE_P), 1 - np.array(TABLE_MARGIN), rtol=0, atol=1e-15
    )


def test_scores_disagree_on_references_example():
    # docs/references.md, "Least confidence and margin": A=[0.5,0.5,0], B=[0.4,0.3,0.3]
    ab = np.array([[0.5, 0.5, 0.0], [0.4, 0.3, 0.3]])
    lc = scores.least_confidence(ab)
    assert_allclose(lc, [0.5, 0.6], atol=1e-15)
    assert lc[1] > lc[0]  # LC ranks B first
    mg = scores.margin(ab)
    assert_allclose(mg, [0.0, 0.10000000000000003], atol=1e-15)
    mu = scores.margin_uncertainty(ab)
    assert mu[0] > mu[1]  # margin ranks A first (descending on 1 - margin)
    h = scores.entropy(ab)
    assert_allclose(h, scipy.stats.entropy(ab, axis=1), rtol=1e-12)
    assert h[0] == pytest.approx(0.693, abs=5e-4) and h[1] == pytest.approx(1.0889, abs=5e-5)
    assert h[1] > h[0]  # entropy ranks B first


def test_bald_worked_example():
    # docs/references.md, "BALD mutual information" (Houlsby et al. 2011; checked with scipy)
    got = scores.bald(BALD_P[None])[0]
    assert got == pytest.approx(0.20888903704423, abs=1e-14)
    # KL form: mean_m KL(p_m || p_bar) with scipy.stats.entropy(p, q)
    p_bar = BALD_P.mean(axis=0)
    kl = np.mean([scipy.stats.entropy(p_m, p_bar) for p_m in BALD_P])
    assert got == pytest.approx(kl, abs=1e-14)


def test_bald_extremes_and_random_against_kl_form():
    # docs/references.md, "BALD mutual information": [1,0] vs [0,1] -> ln 2; identical -> 0
    extremes = scores.bald([[[1.0, 0.0], [0.0, 1.0]], [[0.5, 0.5], [0.5, 0.5]]])
    assert extremes[0] == pytest.approx(0.6931471805599453, abs=1e-15)
    assert extremes[1] == 0.0
    rng = np.random.default_rng(11)
    member = rng.dirichlet(np.ones(4), size=(50, 5))
    p_bar = member.mean(axis=1)
    # reference: scipy.stats.entropy(p_m, p_bar) = KL divergence, averaged over members
    kl = np.array(
        [np.mean([scipy.stats.entropy(p_m, p_bar[i]) for p_m in member[i]]) for i in range(50)]
    )
    assert_allclose(scores.bald(member), kl, rtol=1e-10, atol=1e-14)
    # identical members: rounding can give tiny negatives, which are clipped (same section)
    same = np.repeat(rng.dirichlet(np.ones(6), size=(100, 1)), 7, axis=1)
    assert np.all(scores.bald(same) >= 0.0)
    assert np.all(scores.bald(same) < 1e-12)


def test_ensemble_action_variance_scaling():
    # docs/references.md, "Ensemble variance and Gaussian spread": population variance over
    # members, here divided by the squared range
    rng = np.random.default_rng(3)
    actions = rng.uniform(-1, 3, size=(40, 5, 2))
    low, high = np.array([-1.0, 0.0]), np.array([3.0, 3.0])
    expected = (np.var(actions, axis=1, ddof=0) / (high - low) ** 2).mean(axis=1)
    assert_allclose(scores.ensemble_action_variance(actions, low, high), expected, rtol=1e-12)
    # hand-checkable: members at both bounds of [0, 2] -> variance 1, range^2 4 -> 0.25 (max)
    assert scores.ensemble_action_variance([[[0.0], [2.0]]], 0.0, 2.0)[0] == 0.25
    # a dimension in other units counts the same once scaled
    a = np.array([[[0.0, 0.0], [1.0, 100.0]]])
    assert_allclose(scores.ensemble_action_variance(a, [0, 0], [2, 200]), [0.0625])
    with pytest.raises(ValueError, match="low < high"):
        scores.ensemble_action_variance(actions, high, low)


def test_gaussian_std_scaled():
    # hand-checkable: std 0.5 on [0, 2] -> 0.25; std 10 on [-50, 50] -> 0.1; mean 0.175
    got = scores.gaussian_std_scaled([[0.5, 10.0]], [0.0, -50.0], [2.0, 50.0])
    assert got[0] == pytest.approx(0.175, abs=1e-15)
    with pytest.raises(ValueError, match="non-negative"):
        scores.gaussian_std_scaled([[-0.1, 1.0]], 0.0, 1.0)


def test_uncertainty_dispatch_follows_the_data():
    probs = TABLE_P
    ensemble = np.stack([BALD_P, BALD_P[::-1]])
    u, name = scores.uncertainty_from_learner_outputs("discrete", probs=probs, ensemble=ensemble)
    assert name == "bald"
    assert_allclose(u, scores.bald(ensemble))
    u, name = scores.uncertainty_from_learner_outputs("discrete", probs=probs)
    assert name == "entropy"
    assert_allclose(u, TABLE_H, atol=1e-12)
    u, name = scores.uncertainty_from_learner_outputs("discrete", probs=probs, method="margin")
    assert name == "margin"
    assert_allclose(u, 1 - np.array(TABLE_MARGIN), atol=1e-12)
    u, name = scores.uncertainty_from_learner_outputs(
        "discrete", probs=probs, method="least_confidence"
    )
    assert name == "least_confidence"
    assert_allclose(u, TABLE_LC, atol=1e-12)
    acts = np.array([[[0.0], [2.0]]])
    u, name = scores.uncertainty_from_learner_outputs(
        "continuous", ensemble=acts, std=[[0.1]], low=[0.0], high=[2.0]
    )
    assert name == "ensemble_variance"
    assert_allclose(u, [0.25], atol=1e-12)
    u, name = scores.uncertainty_from_learner_outputs("continuous", std=[[0.5]], low=0, high=2)
    assert name == "gaussian_std"
    assert_allclose(u, [0.25], atol=1e-12)
    assert scores.uncertainty_from_learner_outputs("discrete") == (None, "novelty only")
    assert scores.uncertainty_from_learner_outputs("continuous") == (None, "novelty only")
    with pytest.raises(ValueError, match="bounds"):
        scores.uncertainty_from_learner_outputs("continuous", std=[[0.5]])


def test_percentile_rank_matches_rankdata_average():
    # docs/references.md, "Percentile ranks": scipy.stats.rankdata(method="average") / n
    x = np.array([10.0, 20.0, 20.0, 30.0])
    assert_allclose(scores.percentile_rank(x), [0.25, 0.625, 0.625, 1.0])
    rng = np.random.default_rng(5)
    y = rng.integers(0, 20, size=300).astype(float)
    pr = scores.percentile_rank(y)
    assert_allclose(pr, rankdata(y, method="average") / y.size)
    assert pr.min() > 0 and pr.max() <= 1


def test_combined_score():
    u = np.array([0.25, 0.5, 1.0])
    n = np.array([1.0, 0.5, 0.25])
    # hand-checkable weighted means
    assert_allclose(scores.combined_score(u, n), [0.625, 0.5, 0.625])
    weighted = scores.combined_score(u, n, w_uncertainty=3, w_novelty=1)
    assert_allclose(weighted, [0.4375, 0.5, 0.8125])
    assert_allclose(scores.combined_score(None, n), n)
    assert_allclose(scores.combined_score(u, None), u)
    with pytest.raises(ValueError):
        scores.combined_score(None, None)
    with pytest.raises(ValueError):
        scores.combined_score(u, n, w_uncertainty=0, w_novelty=0)
