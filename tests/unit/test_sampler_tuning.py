"""Self-tuning: the weighted logistic regression against scikit-learn, and on synthetic rounds
the fitted model puts its weight on the signal that really predicts disagreement."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from sklearn.linear_model import LogisticRegression

from expertloop.sampler import tuning

SIGNAL_INDEX = {name: i for i, name in enumerate(tuning.SIGNALS)}


def test_fit_agrees_with_scikit_learn_weighted_and_unweighted():
    # Reference: scikit-learn's LogisticRegression (L2, C=1, lbfgs) minimises the same objective
    # (docs/references.md, "Logistic regression").
    rng = np.random.default_rng(3)
    x = rng.random((400, 3))
    y = rng.random(400) < tuning.expit(-1.0 + 2.5 * x[:, 0] - 1.5 * x[:, 2])
    weights = rng.choice([1.0, 7.5], size=400)
    for sample_weight in (None, weights):
        b, w = tuning.fit_logistic(x, y, sample_weight, c=1.0)
        reference = LogisticRegression(C=1.0, tol=1e-12, max_iter=10_000)
        reference.fit(x, y, sample_weight=sample_weight)
        assert_allclose(w, reference.coef_[0], atol=1e-5)
        assert_allclose(b, reference.intercept_[0], atol=1e-5)


def synthetic_rounds(rng, driver, rounds=6, candidates=600, budget=40, audit_share=0.25):
    """Rounds ranked by today's weighted mean (so ranked picks are high on both signals), with
    disagreement that depends only on `driver`. Returns signals, outcome and stratum weights."""
    parts = []
    for _ in range(rounds):
        signals = np.column_stack(
            [rng.random(candidates), rng.random(candidates), rng.random(candidates) < 0.1]
        ).astype(float)
        p = tuning.expit(-4.0 + 6.0 * signals[:, SIGNAL_INDEX[driver]])
        disagrees = rng.random(candidates) < p
        n_audit = int(budget * audit_share)
        audit = rng.choice(candidates, n_audit, replace=False)
        score = 0.5 * signals[:, 0] + 0.5 * signals[:, 1]
        score[audit] = -np.inf
        ranked = np.argsort(-score)[: budget - n_audit]
        chosen = np.concatenate([audit, ranked])
        is_audit = np.arange(len(chosen)) < n_audit
        weights = tuning.stratum_weights(is_audit, candidates)
        parts.append((signals[chosen], disagrees[chosen], weights))
    return tuple(np.concatenate(column) for column in zip(*parts, strict=True))


@pytest.mark.parametrize(
    "driver,other", [("novelty_pct", "uncertainty_pct"), ("uncertainty_pct", "novelty_pct")]
)
def test_weight_lands_on_the_signal_that_predicts_disagreement(driver, other):
    rng = np.random.default_rng(11)
    signals, disagrees, weights = synthetic_rounds(rng, driver)
    model = tuning.fit_disagreement_model(signals, disagrees, weights)
    assert model.weights[driver] > 2.0
    assert abs(model.weights[other]) < 0.35 * model.weights[driver]
    assert abs(model.weights["near_takeover"]) < 0.35 * model.weights[driver]
    assert model.n_labelled == 240 and model.n_disagreements == int(disagrees.sum())
    # ranking by the model now orders states by the driver, as the truth does
    grid = np.column_stack([np.linspace(0, 1, 5), np.full(5, 0.5), np.zeros(5)])
    if driver == "novelty_pct":
        grid = grid[:, [1, 0, 2]]
    assert np.all(np.diff(model.predict(grid)) > 0)


def test_stratum_weights_by_hand():
    # 3 audit and 7 ranked picks from 100 candidates: the audit rows stand for the 93 others
    weights = tuning.stratum_weights([True, True, True] + [False] * 7, 100)
    assert_allclose(weights, [31.0] * 3 + [1.0] * 7)
    assert_allclose(tuning.stratum_weights([False, False], 10), [1.0, 1.0])
    assert_allclose(tuning.stratum_weights([True, True], 2), [1.0, 1.0])  # never below 1


def test_enough_to_rank_needs_both_outcomes():
    model = tuning.DisagreementModel(0.0, dict.fromkeys(tuning.SIGNALS, 0.0), 30, 12, 30.0)
    assert tuning.enough_to_rank(model, 10)
    assert not tuning.enough_to_rank(model, 13)
    lopsided = tuning.DisagreementModel(0.0, dict.fromkeys(tuning.SIGNALS, 0.0), 30, 25, 30.0)
    assert not tuning.enough_to_rank(lopsided, 10)  # only 5 agreements


def test_effective_counts_by_hand():
    # Kish's effective sample size (sum w)^2 / sum w^2 (L. Kish, 1965, Survey Sampling, from
    # memory; docs/references.md, "Logistic regression"): equal weights count every row, one
    # heavy row counts as about one
    assert tuning.effective_count([1.0, 1.0, 1.0]) == 3.0
    assert_allclose(tuning.effective_count([31.0, 1.0, 1.0]), 33.0**2 / 963.0)  # 1.13
    assert tuning.effective_count([]) == 0.0


def test_enough_to_rank_counts_what_the_fit_sees():
    # one round of 100 candidates: 2 audit rows (weight (100 - 18) / 2 = 41) and 18 ranked; 12
    # disagreements among the ranked rows and one among the audit rows
    is_audit = np.array([True, True] + [False] * 18)
    weights = tuning.stratum_weights(is_audit, 100)
    disagrees = np.array([True, False] + [True] * 12 + [False] * 6)
    signals = np.random.default_rng(0).random((20, 3))
    model = tuning.fit_disagreement_model(signals, disagrees, weights)
    assert model.n_disagreements == 13 and model.n_labelled - model.n_disagreements == 7
    # disagreements: weights 41 and twelve 1s -> 53^2 / (1681 + 12) = 1.66; agreements 41 and
    # six 1s -> 47^2 / 1687 = 1.31 (the fit's rescaling of the weights changes neither)
    assert_allclose(model.effective_disagreements, 53.0**2 / 1693.0)
    assert_allclose(model.effective_agreements, 47.0**2 / 1687.0)
    assert not tuning.enough_to_rank(model, 2)
    assert tuning.enough_to_rank(model, 2, effective=False)  # by rows: 13 and 7
    # a model recorded before the effective counts were: rows decide
    old = tuning.DisagreementModel(0.0, dict.fromkeys(tuning.SIGNALS, 0.0), 30, 12, 30.0)
    assert tuning.enough_to_rank(old, 10)


def test_model_record_round_trips():
    model = tuning.DisagreementModel(
        -1.5, {"uncertainty_pct": 2.0, "novelty_pct": 0.5, "near_takeover": 1.0}, 40, 12, 33.3
    )
    again = tuning.DisagreementModel.from_record(model.record())
    assert again == model
    # hand-checked: expit(-1.5 + 2 * 0.5 + 0.5 * 1 + 1 * 1) = expit(1.0) = 0.7310585786300049
    assert_allclose(again.predict([[0.5, 1.0, 1.0]]), [0.7310585786300049])


def test_calibration_by_hand():
    found = tuning.calibration([0.1, 0.15, 0.7, 0.9], [False, True, True, True])
    assert found["n"] == 4 and found["observed"] == 3
    assert_allclose(found["expected"], 1.85)
    assert_allclose(found["brier"], (0.01 + 0.7225 + 0.09 + 0.01) / 4)
    assert [(b["n"], b["observed_rate"]) for b in found["bins"]] == [(2, 0.5), (1, 1.0), (1, 1.0)]
    assert_allclose(found["bins"][0]["mean_predicted"], 0.125)
    assert tuning.calibration([], [])["brier"] is None


def test_disagreement_of_discrete_and_continuous():
    disagrees, known = tuning.disagreement_of(np.array([0, 1, -1, 2]), np.array([0, 2, 1, -1]))
    assert disagrees.tolist() == [False, True, False, False]
    assert known.tolist() == [True, True, False, False]
    learner = np.array([[0.5, 0.1], [0.5, 0.1], [np.nan, 0.0]])
    expert = np.array([[0.55, 0.1], [0.9, 0.1], [0.5, 0.0]])
    disagrees, known = tuning.disagreement_of(learner, expert, [0.2, 0.04])
    assert disagrees.tolist() == [False, True, False]
    assert known.tolist() == [True, True, False]
