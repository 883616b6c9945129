"""Rank a round's learner-driven states and choose a selection: scores, then selection rules.

Pure: arrays in, arrays out. The job in app/sampler/jobs.py loads the arrays and stores the result.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from ..errors import InvalidInput
from . import scores
from .candidates import RoundSteps
from .novelty import exact_search_fits, legacy_exact_search_fits, novelty
from .selection import rollout_positions, select, takeover_boost
from .tuning import DisagreementModel

NEUTRAL_PERCENTILE = 0.5
AUTO_METHOD = "auto"
"""Uncertainty from the richest learner output: BALD for an ensemble, entropy for probabilities."""


@dataclass(frozen=True)
class RankParams:
    """Everything that decides a selection; recorded with it so a rerun gives the same one."""

    budget: int
    seed: int
    min_gap_steps: int
    audit_fraction: float
    spread: bool
    uncertainty_weight: float
    novelty_weight: float
    novelty_k: int
    takeover_window_s: float
    takeover_boost: float
    uncertainty_method: str = AUTO_METHOD
    self_tuning: bool = True
    tuning_min_disagreements: int = 10
    # recorded jobs from before these existed ranked without strata and gated the self-tuned
    # model on row counts: a rerun must too
    stratify: bool = False
    tuning_effective_counts: bool = False
    # the training set's cut-off when the ranking was requested: a rerun reads the same one
    training_max_step_id: int | None = None
    training_max_label_id: int | None = None
    # jobs recorded before the exact/index choice was measured chose by their pair count: a
    # rerun must search the same way (novelty.legacy_exact_search_fits)
    search_by_candidates: bool = False
    # jobs recorded before consensus gave each annotator one vote per state counted every
    # label of the training set and its history (training_set.Cutoff.one_vote_each)
    one_vote_each: bool = False


@dataclass
class Ranking:
    """Scores of every candidate (arrays of shape (n_candidates,)) and the chosen states."""

    step_id: np.ndarray
    uncertainty: np.ndarray  # nan where the learner reported nothing usable
    novelty: np.ndarray  # nan when there is no training set yet
    uncertainty_pct: np.ndarray
    novelty_pct: np.ndarray
    boost: np.ndarray
    score: np.ndarray  # combined score plus boost
    chosen: np.ndarray  # indexes into the candidates, audit picks first
    reasons: np.ndarray
    ranks: np.ndarray
    uncertainty_method: str
    near_takeover: np.ndarray  # bool: within the window before an expert takeover
    predicted: np.ndarray  # predicted probability of disagreement; nan without a model
    methods: dict[str, object] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def _uncertainty(
    steps: RoundSteps,
    rows: np.ndarray,
    kind: Literal["discrete", "continuous"],
    low: np.ndarray,
    high: np.ndarray,
    method: str,
) -> tuple[np.ndarray, str]:
    """Uncertainty of the candidate rows from the richest output the learner reported."""
    values = np.full(len(rows), np.nan)
    if steps.ensemble is not None and steps.has_ensemble[rows].any():
        have = steps.has_ensemble[rows]
        if kind == "discrete" and method != AUTO_METHOD:
            # a chosen probability score applies to the ensemble's mean probabilities
            found, name = scores.uncertainty_from_learner_outputs(
                kind,
                probs=steps.ensemble[rows][have].mean(axis=1),
                method=method,  # type: ignore[arg-type]
            )
            name = f"{name} (ensemble mean)"  # fits the 32 characters stored
        else:
            found, name = scores.uncertainty_from_learner_outputs(
                kind, ensemble=steps.ensemble[rows][have], low=low, high=high
            )
    elif kind == "discrete" and steps.probs is not None and steps.has_probs[rows].any():
        have = steps.has_probs[rows]
        found, name = scores.uncertainty_from_learner_outputs(
            kind,
            probs=steps.probs[rows][have],
            method="entropy" if method == AUTO_METHOD else method,  # type: ignore[arg-type]
        )
    elif kind == "continuous" and steps.std is not None and steps.has_std[rows].any():
        have = steps.has_std[rows]
        found, name = scores.uncertainty_from_learner_outputs(
            kind, std=steps.std[rows][have], low=low, high=high
        )
    else:
        return values, "novelty only"
    assert found is not None
    values[have] = found
    return values, name


def _percentiles(values: np.ndarray) -> np.ndarray:
    out = np.full(len(values), NEUTRAL_PERCENTILE)
    known = ~np.isnan(values)
    if known.any():
        out[known] = scores.percentile_rank(values[known])
    return out


def signals_of(u_pct: np.ndarray, n_pct: np.ndarray, near_takeover: np.ndarray) -> np.ndarray:
    """The disagreement model's inputs (n, 3), in app.sampler.tuning.SIGNALS order."""
    return np.column_stack([u_pct, n_pct, near_takeover.astype(np.float64)])


def rank_round(
    steps: RoundSteps,
    training_features: np.ndarray,
    *,
    kind: Literal["discrete", "continuous"],
    low: np.ndarray,
    high: np.ndarray,
    params: RankParams,
    model: DisagreementModel | None = None,
    progress: Callable[[float], None] = lambda _: None,
) -> Ranking:
    """Score every learner-driven state of a round and choose the selection.

    With a ``model``, the score is its predicted probability of disagreement (nearness to a
    takeover is one of its inputs, so no boost is added); otherwise the weighted mean of the
    percentiles plus the takeover boost.
    """
    candidates = np.flatnonzero(~steps.expert)
    if len(candidates) == 0:
        raise InvalidInput("the round has no learner-driven states to rank")
    notes: list[str] = []
    uncertainty, method = _uncertainty(
        steps, candidates, kind, low, high, params.uncertainty_method
    )
    if method == "novelty only":
        notes.append("the rollouts carry no learner outputs: ranked on novelty alone")
    elif np.isnan(uncertainty).any():
        notes.append(
            f"{int(np.isnan(uncertainty).sum())} states carry no learner outputs: "
            "they get the median uncertainty percentile"
        )
    progress(0.2)
    search = None
    if len(training_features):
        fits = exact_search_fits if params.search_by_candidates else legacy_exact_search_fits
        exact = fits(len(candidates), len(training_features))
        search = "exact" if exact else "approximate (faiss IVF)"
        novel = novelty(
            steps.features[candidates],
            training_features,
            k=params.novelty_k,
            exact_threshold=len(training_features) if exact else 0,
            rng=np.random.default_rng(params.seed),
            progress=lambda f: progress(0.2 + 0.6 * f),
        )
    else:
        novel = np.full(len(candidates), np.nan)
        notes.append("the training set is empty: ranked on uncertainty alone")
    if method == "novelty only" and np.isnan(novel).all():
        raise InvalidInput(
            "nothing to rank on: the rollouts carry no learner outputs and the training set "
            "is empty (upload round 0 demonstrations first)"
        )
    progress(0.8)
    u_pct = _percentiles(uncertainty)
    n_pct = _percentiles(novel)
    boost_all = takeover_boost(
        steps.rollout_id,
        steps.time_s,
        steps.expert,
        params.takeover_window_s,
        1.0,
    )
    near_takeover = boost_all[candidates] > 0
    predicted = np.full(len(candidates), np.nan)
    if model is not None:
        predicted = model.predict(signals_of(u_pct, n_pct, near_takeover))
        combined = predicted
        boost = np.zeros(len(candidates))
        score_method = "predicted disagreement"
    else:
        combined = scores.combined_score(
            None if method == "novelty only" else u_pct,
            None if np.isnan(novel).all() else n_pct,
            params.uncertainty_weight,
            params.novelty_weight,
        )
        boost = np.where(near_takeover, params.takeover_boost, 0.0)
        score_method = "weighted mean of percentiles"
    positions = rollout_positions(steps.rollout_id, steps.step_index)
    result = select(
        combined,
        steps.rollout_id[candidates],
        positions[candidates],
        params.budget,
        min_gap=params.min_gap_steps,
        audit_fraction=params.audit_fraction,
        rng=np.random.default_rng(params.seed),
        features=steps.features[candidates] if params.spread or params.stratify else None,
        spread=params.spread,
        takeover_boost=boost,
        stratify=params.stratify,
    )
    notes.extend(result.notes)
    progress(0.9)
    return Ranking(
        step_id=steps.step_id[candidates],
        uncertainty=uncertainty,
        novelty=novel,
        uncertainty_pct=u_pct,
        novelty_pct=n_pct,
        boost=boost,
        score=result.effective_scores,
        chosen=result.indices,
        reasons=result.reasons,
        ranks=result.ranks,
        uncertainty_method=method,
        near_takeover=near_takeover,
        predicted=predicted,
        methods={
            "uncertainty": method,
            "novelty": search or "none (empty training set)",
            "score": score_method,
            "min_gap_steps": params.min_gap_steps,
            "gap_steps_used": result.final_gap,
            "spread": params.spread,
            "stratify": params.stratify,
        },
        notes=notes,
    )
