"""Round-report statistics checked against published values and reference libraries.

The source of each expected value is named beside its check, as a section of docs/references.md.
"""

import krippendorff
import numpy as np
import pytest
import statsmodels.stats.inter_rater as inter_rater
import statsmodels.stats.tests.test_inter_rater as statsmodels_inter_rater_tests
from numpy.testing import assert_allclose, assert_array_equal
from numpy.typing import ArrayLike
from scipy.spatial.distance import pdist
from scipy.stats import binomtest, ttest_ind
from sklearn.metrics import cohen_kappa_score, mean_absolute_error
from sklearn.metrics.pairwise import rbf_kernel
from statsmodels.stats.proportion import confint_proportions_2indep, proportion_confint

from expertloop.reports.agreement import (
    agreement_with_consensus,
    cohen_kappa,
    fleiss_kappa,
    krippendorff_alpha,
)
from expertloop.reports.rates import (
    MIN_AUDIT_LABELS,
    audit_sufficient,
    continuous_disagreement,
    disagreement,
    disagreement_by_change,
    shown_vs_hidden_effect,
    wilson_interval,
)
from expertloop.reports.shift import (
    median_heuristic,
    mmd_permutation_test,
    standardised_mean_difference,
)
from expertloop.shared.pace import labels_per_hour

# --- Wilson interval -------------------------------------------------------------------------


def test_wilson_matches_references_table() -> None:
    # docs/references.md, "Wilson score interval": statsmodels
    # proportion_confint(method='wilson') for Newcombe's 1998 cases (the cases and their 4-dp
    # limits are from memory).
    k = np.array([81, 15, 0, 1, 20])
    n = np.array([263, 148, 20, 29, 20])
    lower, upper = wilson_interval(k, n)
    expected_lower = [0.2552885198782742, 0.06238639953073628, 0.0, 0.006113214292762667,
                      0.8388748419471804]  # fmt: skip
    expected_upper = [0.36620957698280004, 0.16048724172330803, 0.1611251580528194,
                      0.17175521879320294, 0.9999999999999999]  # fmt: skip
    assert_allclose(lower, expected_lower, rtol=1e-12, atol=1e-15)
    assert_allclose(upper, expected_upper, rtol=1e-12, atol=1e-15)


def test_wilson_matches_statsmodels_and_scipy_on_a_grid() -> None:
    # References: statsmodels proportion_confint(method='wilson') and
    # scipy.stats.binomtest(k, n).proportion_ci(method='wilson').
    n = np.repeat(np.arange(1, 41), 41)
    k = np.tile(np.arange(41), 40)
    keep = k <= n
    k, n = k[keep], n[keep]
    lower, upper = wilson_interval(k, n)
    ref_lower, ref_upper = proportion_confint(k, n, alpha=0.05, method="wilson")
    assert_allclose(lower, ref_lower, rtol=1e-12, atol=1e-15)
    assert_allclose(upper, ref_upper, rtol=1e-12, atol=1e-15)
    for kk, nn in [(0, 1), (3, 7), (50, 90), (99, 100)]:
        ci = binomtest(kk, nn).proportion_ci(confidence_level=0.9, method="wilson")
        assert_allclose(wilson_interval(kk, nn, confidence=0.9), [ci.low, ci.high], rtol=1e-12)


def test_wilson_empty_and_invalid() -> None:
    # No trials -> no interval (documented behaviour), not a made-up [0, 1].
    lower, upper = wilson_interval([0, 3], [0, 10])
    assert np.isnan(lower[0]) and np.isnan(upper[0])
    assert 0 < lower[1] < 0.3 < upper[1] < 1
    with pytest.raises(ValueError):
        wilson_interval(5, 4)


def test_audit_sufficient() -> None:
    # Common practice: n >= 30 before quoting a proportion on its own.
    assert MIN_AUDIT_LABELS == 30
    assert not audit_sufficient(29) and audit_sufficient(30)
    assert audit_sufficient(10, minimum=10)


# --- disagreement ----------------------------------------------------------------------------


def test_discrete_disagreement_by_hand_and_statsmodels() -> None:
    # Hand-checked: state 3 is unresolved (-1) and left out; 1 of 3 compared states differs.
    result = disagreement([0, 1, 2, 1], [0, 2, 2, -1])
    assert (result.count, result.n, result.n_excluded) == (1, 3, 1)
    assert result.rate == pytest.approx(1 / 3)
    # statsmodels proportion_confint(method='wilson') for the interval.
    assert_allclose([result.lower, result.upper], proportion_confint(1, 3, method="wilson"))
    assert result.mean_absolute_error is None


def test_continuous_disagreement_tolerance_and_mae() -> None:
    learner = np.array([[0.0, 1.0], [0.5, 1.0], [0.0, 2.0], [1.0, 1.0]])
    expert = np.array([[0.1, 1.0], [0.0, 1.0], [0.0, 1.0], [np.nan, np.nan]])
    result = continuous_disagreement(learner, expert, tolerance=[0.2, 0.5])
    # Hand-checked: row 0 within tolerance, row 1 exceeds dim 0, row 2 exceeds dim 1,
    # row 3 has no consensus (nan) and is left out.
    assert (result.count, result.n, result.n_excluded) == (2, 3, 1)
    # sklearn mean_absolute_error(multioutput='raw_values') on the compared rows.
    assert result.mean_absolute_error is not None
    reference = mean_absolute_error(expert[:3], learner[:3], multioutput="raw_values")
    assert_allclose(result.mean_absolute_error, reference)


def test_disagreement_by_change_exposes_a_copy_previous_policy() -> None:
    # docs/references.md, "Disagreement rates and mean absolute error": a policy that copies its
    # previous action is right wherever the expert keeps it and wrong wherever the expert
    # changes it.
    rng = np.random.default_rng(5)
    previous = rng.integers(0, 3, 200)
    expert = np.where(rng.random(200) < 0.2, (previous + 1) % 3, previous)
    expert[:5] = -1  # unresolved states are left out of both groups
    previous[5:8] = -1  # first steps of rollouts have no previous action
    learner = previous.copy()
    learner[5:8] = 0
    split = disagreement_by_change(learner, expert, previous)
    keep = (expert >= 0) & (previous >= 0)
    n_changed = int(np.sum(keep & (expert != previous)))
    assert split.changed.n == n_changed and split.changed.rate == 1.0
    assert split.unchanged.n == int(keep.sum()) - n_changed and split.unchanged.rate == 0.0
    assert split.changed.n_excluded == 8
    # statsmodels proportion_confint(method='wilson') for each group's interval.
    assert_allclose(
        [split.changed.lower, split.changed.upper],
        proportion_confint(n_changed, n_changed, method="wilson"),
    )
    overall = disagreement(learner[keep], expert[keep])
    assert overall.rate < 0.3  # looks accurate overall, which is the point of the split


# --- MMD and the median heuristic ------------------------------------------------------------


def reference_mmd2(x: np.ndarray, y: np.ndarray, bandwidth: float) -> tuple[float, float]:
    """Slow, obvious reference: (unbiased, biased) squared MMD, Gretton et al. 2012 Lemma 6
    written out with sklearn's rbf_kernel (gamma = 1 / (2 l^2)) and explicit off-diagonal masks
    (docs/references.md, "Squared MMD with an RBF kernel")."""
    gamma = 1.0 / (2.0 * bandwidth**2)
    k_xx, k_yy, k_xy = (
        rbf_kernel(x, x, gamma=gamma),
        rbf_kernel(y, y, gamma=gamma),
        rbf_kernel(x, y, gamma=gamma),
    )
    off_x, off_y = ~np.eye(len(x), dtype=bool), ~np.eye(len(y), dtype=bool)
    unbiased = k_xx[off_x].mean() + k_yy[off_y].mean() - 2 * k_xy.mean()
    biased = k_xx.mean() + k_yy.mean() - 2 * k_xy.mean()
    return float(unbiased), float(biased)


def mmd2(x: ArrayLike, y: ArrayLike, bandwidth: float) -> float:
    """The product's squared MMD at a fixed kernel scale (one permutation, no subsampling)."""
    return mmd_permutation_test(x, y, 1, np.random.default_rng(0), bandwidth=bandwidth).mmd2


def test_mmd_small_exact_example() -> None:
    # docs/references.md, "Squared MMD with an RBF kernel" (Gretton et al. 2012): X=[[0],[1]],
    # Y=[[2],[3]], l=1.
    x, y = np.array([[0.0], [1.0]]), np.array([[2.0], [3.0]])
    assert mmd2(x, y, 1.0) == pytest.approx(0.7689062080632163, rel=1e-14)
    # the reference written with sklearn gives the same pair of published values
    unbiased, biased = reference_mmd2(x, y, 1.0)
    assert unbiased == pytest.approx(0.7689062080632163, rel=1e-14)
    assert biased == pytest.approx(1.1623755483505829, rel=1e-14)


def test_mmd_matches_slow_reference_from_sklearn_kernel() -> None:
    # Far from the origin to exercise centring, at two kernel scales
    # (docs/references.md, "Squared MMD with an RBF kernel").
    rng = np.random.default_rng(1)
    x = rng.normal(size=(25, 3)) + 500.0
    y = rng.normal(size=(18, 3)) * 1.3 + 500.2
    for bandwidth in (0.5, 1.2, 1.7):
        expected, _ = reference_mmd2(x, y, bandwidth)
        assert mmd2(x, y, bandwidth) == pytest.approx(expected, rel=1e-9)


def test_mmd_monte_carlo_matches_gaussian_closed_form() -> None:
    # docs/references.md, "Squared MMD with an RBF kernel", closed form, d=3, mu2=(1,0,0), s1=1,
    # s2=1.5, l=1:
    # MMD^2 = 0.0670444096650469; E[biased] = MMD^2 + (1 - E k_xx)/m + (1 - E k_yy)/n with
    # E k_xx = 0.19245008972987523 and E k_yy = 0.07752753322022198 (derived there).
    rng = np.random.default_rng(12345)
    m = n = 200
    replicates = 150
    unbiased = np.empty(replicates)
    for r in range(replicates):
        x = rng.normal(size=(m, 3))
        y = rng.normal(size=(n, 3)) * 1.5 + np.array([1.0, 0.0, 0.0])
        unbiased[r] = mmd2(x, y, 1.0)
    truth = 0.0670444096650469
    se = unbiased.std(ddof=1) / np.sqrt(replicates)
    assert abs(unbiased.mean() - truth) < 4 * se
    # The biased estimator's expectation sits many standard errors away (its bias term is about
    # 8.6e-3 here), so this also tells the unbiased estimate from the biased one.
    biased_truth = truth + (1 - 0.19245008972987523) / m + (1 - 0.07752753322022198) / n
    assert abs(unbiased.mean() - biased_truth) > 4 * se


def test_median_heuristic_convention() -> None:
    # docs/references.md, "Median heuristic bandwidth": median(pdist([0,1,2,3])) = 1.5 (not 1.0
    # with the diagonal, not 1.5811 from squared distances).
    assert median_heuristic([[0.0], [1.0], [2.0], [3.0]]) == 1.5
    # scipy.spatial.distance.pdist as the reference on random data.
    z = np.random.default_rng(2).normal(size=(41, 5))
    assert median_heuristic(z) == pytest.approx(np.median(pdist(z)), rel=1e-12)


def test_median_heuristic_with_mostly_duplicate_points() -> None:
    # Documented fallback: 4 identical points and one other -> 6 of 10 distances are 0,
    # so the median of the positive distances (all 2.0) is used.
    z = [[0.0], [0.0], [0.0], [0.0], [2.0]]
    assert median_heuristic(z) == 2.0
    with pytest.raises(ValueError, match="coincide"):
        median_heuristic([[1.0], [1.0]])


def test_permutation_test_matches_a_slow_loop_on_the_same_random_stream() -> None:
    # Slow reference: the documented use of rng (subsample X, then Y, then one
    # rng.permutation per permutation), the sklearn-written unbiased MMD on each split, and
    # p = (1 + #{perm >= observed}) / (1 + n_perm) (docs/references.md, "Permutation p-value").
    data_rng = np.random.default_rng(3)
    x = data_rng.normal(size=(60, 2))
    y = data_rng.normal(size=(45, 2)) + 0.3
    result = mmd_permutation_test(x, y, 99, np.random.default_rng(77), max_samples=40)

    rng = np.random.default_rng(77)
    xs = x[rng.choice(60, 40, replace=False)]
    ys = y[rng.choice(45, 40, replace=False)]
    pooled = np.vstack([xs, ys])
    bandwidth = np.median(pdist(pooled))  # scipy pdist, the stated convention
    observed, _ = reference_mmd2(xs, ys, bandwidth)
    exceed = 0
    for _ in range(99):
        order = rng.permutation(80)
        permuted, _ = reference_mmd2(pooled[order[:40]], pooled[order[40:]], bandwidth)
        exceed += permuted >= observed
    assert result.bandwidth == pytest.approx(bandwidth, rel=1e-12)
    assert result.mmd2 == pytest.approx(observed, rel=1e-9)
    assert result.p_value == (1 + exceed) / 100


def test_permutation_test_calibration_and_power() -> None:
    # Common practice: under the null a permutation p-value is (discretely) uniform, so about
    # 5% of replicates fall at or below 0.05; a clear shift gives the smallest possible p.
    rng = np.random.default_rng(8)
    p_values = np.array(
        [
            mmd_permutation_test(
                rng.normal(size=(30, 2)), rng.normal(size=(25, 2)), 99, rng
            ).p_value
            for _ in range(100)
        ]
    )
    # Binomial(100, 0.05): P(X >= 13) < 0.002; uniform mean 0.5 with SE 0.029.
    assert np.sum(p_values <= 0.05) <= 12
    assert 0.38 < p_values.mean() < 0.62
    shifted = mmd_permutation_test(
        rng.normal(size=(50, 2)), rng.normal(size=(50, 2)) + 1.0, 199, rng
    )
    assert shifted.p_value == 1 / 200
    assert shifted.mmd2 > 0


# --- standardised mean difference ------------------------------------------------------------


def test_smd_matches_scipy_t_statistic_and_sorts_by_size() -> None:
    # docs/references.md, "Standardised mean difference": Cohen's d with pooled std equals the
    # equal-variance t statistic times
    # sqrt(1/m + 1/n) (scipy.stats.ttest_ind, equal_var=True).
    rng = np.random.default_rng(4)
    x = rng.normal(size=(80, 4))
    y = rng.normal(size=(50, 4)) + np.array([0.1, -1.5, 0.0, 0.6])
    names = ["speed", "heading", "gap", "lane_offset"]
    shifts = standardised_mean_difference(x, y, names)
    t = ttest_ind(y, x, equal_var=True).statistic
    expected = dict(zip(names, t * np.sqrt(1 / 80 + 1 / 50), strict=True))
    for shift in shifts:
        assert shift.smd == pytest.approx(expected[shift.name], rel=1e-10)
    assert [s.name for s in shifts][:2] == ["heading", "lane_offset"]
    assert np.all(np.diff([abs(s.smd) for s in shifts]) <= 0)


def test_smd_constant_features() -> None:
    # Documented: constant in both samples -> 0 when means match, +-inf when they differ.
    x = np.array([[1.0, 2.0], [1.0, 2.0]])
    y = np.array([[1.0, 3.0], [1.0, 3.0]])
    shifts = {s.name: s.smd for s in standardised_mean_difference(x, y, ["a", "b"])}
    assert shifts == {"a": 0.0, "b": np.inf}


# --- Cohen's, Fleiss' and Krippendorff's agreement -------------------------------------------


def _pairs_from_table(table: list[list[int]]) -> tuple[np.ndarray, np.ndarray]:
    counts = np.asarray(table)
    rows, cols = np.indices(counts.shape)
    return np.repeat(rows.ravel(), counts.ravel()), np.repeat(cols.ravel(), counts.ravel())


def test_cohen_kappa_published_and_weighted_values() -> None:
    # docs/references.md, "Cohen's kappa": the 50-item 2x2 example (Wikipedia, from memory): 0.4.
    a, b = _pairs_from_table([[20, 5], [10, 15]])
    assert cohen_kappa(a, b, 2) == pytest.approx(0.4, rel=1e-12)
    # same section, constructed table, exact fractions (sklearn/statsmodels agree).
    a, b = _pairs_from_table([[10, 4, 1], [3, 12, 5], [1, 2, 12]])
    assert cohen_kappa(a, b, 3) == pytest.approx(43 / 83, rel=1e-12)
    assert cohen_kappa(a, b, 3, weights="linear") == pytest.approx(62 / 107, rel=1e-12)
    assert cohen_kappa(a, b, 3, weights="quadratic") == pytest.approx(20 / 31, rel=1e-12)


def test_cohen_kappa_weights_use_category_indices() -> None:
    # docs/references.md, "Cohen's kappa": with categories 1..4 (3 unused) sklearn gives
    # 0.6190476190476191 (linear) and 0.6666666666666667 (quadratic) when labels=[1,2,3,4].
    x = [1, 2, 4, 4, 2, 1, 4, 2]
    y = [1, 2, 4, 2, 2, 1, 4, 4]
    assert cohen_kappa(x, y, 5, weights="linear") == pytest.approx(0.6190476190476191)
    assert cohen_kappa(x, y, 5, weights="quadratic") == pytest.approx(0.6666666666666667)


def test_cohen_kappa_matches_sklearn_and_drops_unsure() -> None:
    # sklearn cohen_kappa_score(labels=range(K), weights=...) as the reference.
    rng = np.random.default_rng(6)
    a = rng.integers(0, 4, 300)
    b = np.where(rng.random(300) < 0.6, a, rng.integers(0, 4, 300))
    for weights in (None, "linear", "quadratic"):
        expected = cohen_kappa_score(a, b, labels=[0, 1, 2, 3], weights=weights)
        assert cohen_kappa(a, b, 4, weights=weights) == pytest.approx(expected, rel=1e-12)
    # Pairs with an unsure (-1) answer are left out (documented).
    a_unsure, b_unsure = np.append(a, [-1, 2]), np.append(b, [3, -1])
    assert cohen_kappa(a_unsure, b_unsure, 4) == pytest.approx(cohen_kappa_score(a, b))


FLEISS_TABLE = [
    [0, 0, 0, 0, 14], [0, 2, 6, 4, 2], [0, 0, 3, 5, 6], [0, 3, 9, 2, 0], [2, 2, 8, 1, 1],
    [7, 7, 0, 0, 0], [3, 2, 6, 3, 0], [2, 5, 3, 2, 2], [6, 5, 2, 1, 0], [0, 2, 2, 3, 7],
]  # fmt: skip


def test_fleiss_kappa_published_example() -> None:
    # docs/references.md, "Fleiss' kappa": Wikipedia worked example (from memory), 4211/20059,
    # statsmodels fleiss_kappa prints 0.20993070442195522.
    assert fleiss_kappa(FLEISS_TABLE) == pytest.approx(4211 / 20059, rel=1e-12)
    assert fleiss_kappa(FLEISS_TABLE) == pytest.approx(0.20993070442195522, rel=1e-12)


def test_fleiss_kappa_matches_statsmodels() -> None:
    # docs/references.md, "Fleiss' kappa": Fleiss 1971 diagnoses data (30 x 6 raters, shipped in
    # statsmodels' tests) -> 0.43024452006014074; R irr gives 0.4302445.
    table, _ = inter_rater.aggregate_raters(statsmodels_inter_rater_tests.diagnoses)
    assert fleiss_kappa(table) == pytest.approx(0.43024452006014074, rel=1e-12)
    rng = np.random.default_rng(9)
    for _ in range(5):
        counts = rng.multinomial(7, rng.dirichlet(np.ones(4)), size=25)
        assert fleiss_kappa(counts) == pytest.approx(inter_rater.fleiss_kappa(counts), rel=1e-12)
    with pytest.raises(ValueError, match="same number"):
        fleiss_kappa([[1, 1], [2, 1]])


NAN = np.nan
KRIPPENDORFF_DATA = np.array(
    [
        [1, 2, 3, 3, 2, 1, 4, 1, 2, NAN, NAN, NAN],
        [1, 2, 3, 3, 2, 2, 4, 1, 2, 5, NAN, 3],
        [NAN, 3, 3, 3, 2, 3, 4, 2, 2, 5, 1, NAN],
        [1, 2, 3, 3, 2, 4, 4, 1, 2, 5, 1, NAN],
    ]
)


def test_krippendorff_alpha_published_values() -> None:
    # docs/references.md, "Krippendorff's alpha": Krippendorff 2011; published 0.743 (nominal) and
    # 0.849 (interval) from memory, exact 113/152 and 951/1120 by an independent Fraction
    # implementation.
    nominal = krippendorff_alpha(KRIPPENDORFF_DATA, "nominal")
    interval = krippendorff_alpha(KRIPPENDORFF_DATA, "interval")
    assert round(nominal, 3) == 0.743 and nominal == pytest.approx(113 / 152, rel=1e-12)
    assert round(interval, 3) == 0.849 and interval == pytest.approx(951 / 1120, rel=1e-12)
    # same section: the transposed layout gives -0.05485893416927867.
    transposed = krippendorff_alpha(KRIPPENDORFF_DATA.T, "nominal")
    assert transposed == pytest.approx(-0.05485893416927867, rel=1e-12)


def test_krippendorff_alpha_matches_the_krippendorff_package() -> None:
    # krippendorff 0.9 alpha(level_of_measurement=...) as the reference, all four levels;
    # ordinal 0.8153875037548814 and ratio 0.7974027747116121
    # (docs/references.md, "Krippendorff's alpha").
    for level in ("nominal", "ordinal", "interval", "ratio"):
        expected = krippendorff.alpha(
            reliability_data=KRIPPENDORFF_DATA, level_of_measurement=level
        )
        assert krippendorff_alpha(KRIPPENDORFF_DATA, level) == pytest.approx(expected, rel=1e-12)
    rng = np.random.default_rng(10)
    data = rng.integers(0, 5, size=(5, 40)).astype(float)
    data[rng.random(data.shape) < 0.3] = np.nan
    domain = [0, 1, 2, 3, 4, 5, 6]  # categories 5 and 6 unused: they matter for ordinal
    for level in ("nominal", "ordinal", "interval", "ratio"):
        expected = krippendorff.alpha(
            reliability_data=data, level_of_measurement=level, value_domain=domain
        )
        result = krippendorff_alpha(data, level, value_domain=domain)
        assert result == pytest.approx(expected, rel=1e-10)


# --- annotator agreement, pace, anchoring ----------------------------------------------------


def test_agreement_with_consensus_by_hand() -> None:
    # Hand-checked. Consensus: state 0 -> 1, state 1 unresolved, state 2 -> 0.
    annotators = np.array(["ana", "ana", "ana", "ben", "ben", "ben", "cy"])
    states = np.array([0, 1, 2, 0, 2, 1, 1])
    actions = np.array([1, 0, 1, 1, -1, 2, 0])
    result = agreement_with_consensus(annotators, states, actions, [1, -1, 0])
    assert_array_equal(result.annotator_ids, ["ana", "ben", "cy"])
    assert_array_equal(result.n_compared, [2, 1, 0])  # unresolved and unsure are left out
    assert_array_equal(result.n_agreeing, [1, 1, 0])
    assert_allclose(result.fraction, [0.5, 1.0, np.nan])


def test_labels_per_hour_by_definition() -> None:
    # Hand-checked from the documented definition (common practice: idle gaps excluded).
    # Annotator 0: 0, 60, 120 | 2000 (gap 1880 s > 900 s: break), 2030 -> 3 timed, 150 s.
    # Annotator 1: 10, 40 -> 1 timed, 30 s. Team: 4 labels in 180 s = 80 per person-hour.
    times = [0, 60, 10, 120, 40, 2000, 2030]
    who = [0, 0, 1, 0, 1, 0, 0]
    pace = labels_per_hour(times, who)
    assert (pace.timed_labels, pace.n_labels) == (4, 7)
    assert pace.active_hours == pytest.approx(180 / 3600)
    assert pace.labels_per_hour == pytest.approx(80.0)
    alone = labels_per_hour([0, 60, 120, 2000, 2030])
    assert alone.labels_per_hour == pytest.approx(3 / (150 / 3600))
    assert np.isnan(labels_per_hour([5.0]).labels_per_hour)


def test_shown_vs_hidden_effect_newcombe_interval() -> None:
    # docs/references.md, "Newcombe interval for a difference of proportions": Newcombe 1998,
    # method 10, example 56/70 vs 48/80: (0.0524, 0.3339) from memory; statsmodels
    # confint_proportions_2indep(method='newcomb') as reference.
    agree = np.array([True] * 56 + [False] * 14 + [True] * 48 + [False] * 32)
    shown = np.array([True] * 70 + [False] * 80)
    effect = shown_vs_hidden_effect(agree, shown)
    assert (effect.n_shown, effect.n_hidden) == (70, 80)
    assert effect.difference == pytest.approx(0.2)
    assert round(effect.lower, 4) == 0.0524 and round(effect.upper, 4) == 0.3339
    rng = np.random.default_rng(11)
    for _ in range(10):
        n1, n2 = rng.integers(1, 60, 2)
        k1, k2 = rng.integers(0, n1 + 1), rng.integers(0, n2 + 1)
        agree = np.array([True] * k1 + [False] * (n1 - k1) + [True] * k2 + [False] * (n2 - k2))
        shown = np.array([True] * n1 + [False] * n2)
        effect = shown_vs_hidden_effect(agree, shown)
        low, high = confint_proportions_2indep(k1, n1, k2, n2, method="newcomb", compare="diff")
        assert_allclose([effect.lower, effect.upper], [low, high], rtol=1e-10, atol=1e-14)


def test_shown_vs_hidden_without_hidden_labels() -> None:
    effect = shown_vs_hidden_effect(np.array([True, False]), np.array([True, True]))
    assert effect.rate_shown == 0.5
    assert np.isnan(effect.rate_hidden) and np.isnan(effect.lower) and np.isnan(effect.upper)
