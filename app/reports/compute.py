"""Turn a round's arrays into report sections by calling the statistics in ``stats``.

Pure functions: arrays in, report schemas out, no store access. ``service`` loads the arrays;
the annotator sections are in ``annotators``.

Conventions (shared with ``service``)
-------------------------------------
- Discrete actions are int64 indices with -1 for "none" (no learner action recorded, an
  unsure answer, an unresolved consensus, no previous step). Continuous actions are float64
  rows of shape (n, n_dims) with ``nan`` rows for "none".
- The expert's answer on a state is the consensus of its labels (majority vote, or the
  per-dimension median for continuous actions), as in the training set.
- A continuous learner action agrees with the expert when every dimension lies within the
  loop's tolerance of the consensus (``rates.continuous_disagreement``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..loops.spec import LoopSpec
from . import rates, shift
from .schemas import (
    FeatureShiftRead,
    RateRead,
    SampleRead,
    ShiftRead,
)

MOST_SHIFTED = 10
"""Features listed in the shift section, largest |standardised mean difference| first."""


@dataclass(frozen=True)
class SampleArrays:
    """One sample of selected states (all arrays share the first axis, n_states).

    learner, expert, previous : ndarray of shape (n_states,) int or (n_states, n_dims) float
        The learner's action on the state, the expert consensus, and the learner's action at
        the previous step of the same rollout.
    """

    learner: np.ndarray
    expert: np.ndarray
    previous: np.ndarray


@dataclass(frozen=True)
class LabelArrays:
    """The round's labels (first axis n_labels) and the consensus of their states.

    annotator : ndarray of shape (n_labels,) int, user ids
    state : ndarray of shape (n_labels,) int, index into ``consensus``
    action : ndarray (n_labels,) int or (n_labels, n_dims) float, "none" for unsure answers
    created_s : ndarray of shape (n_labels,) float, submission time in seconds
    learner_shown : ndarray of shape (n_labels,) bool
    learner_action : like ``action``, the learner's action on the label's state
    consensus : ndarray (n_states,) int or (n_states, n_dims) float
    """

    annotator: NDArray[np.int64]
    state: NDArray[np.int64]
    action: np.ndarray
    created_s: NDArray[np.float64]
    learner_shown: NDArray[np.bool_]
    learner_action: np.ndarray
    consensus: np.ndarray

    def voted(self) -> NDArray[np.bool_]:
        """Labels that name an action (not unsure)."""
        return present(self.action)


def present(actions: np.ndarray) -> NDArray[np.bool_]:
    """Which actions are given: index >= 0 (discrete) or a row without ``nan`` (continuous)."""
    if actions.ndim == 1:
        return np.asarray(actions >= 0)
    return np.asarray(~np.isnan(actions).any(axis=1))


def json_number(value: float) -> float | None:
    """A float for JSON: ``None`` where the statistic is undefined."""
    return float(value) if np.isfinite(value) else None


# --- learner versus expert ------------------------------------------------------------------


def rate_read(
    found: rates.Disagreement, minimum: int, what: str, no_learner_action: int = 0
) -> RateRead:
    """Quote a disagreement only from at least ``minimum`` compared states (see MIN_AUDIT_LABELS).

    ``no_learner_action`` counts states with an expert answer left out because their rollout
    recorded no learner action: the note names them, or a round labelled in full would read as
    one that lacks labels.
    """
    quoted = rates.audit_sufficient(found.n, minimum)
    mae = found.mean_absolute_error
    note = None
    if not quoted:
        note = (
            f"too few {what}: {found.n} states with an expert answer, {minimum} needed "
            "before a disagreement rate means anything"
        )
        if no_learner_action:
            note += (
                f"; {no_learner_action} more states with an expert answer were left out because "
                "their rollouts recorded no learner action to compare it with"
            )
    return RateRead(
        count=found.count,
        n=found.n,
        n_excluded=found.n_excluded,
        quoted=quoted,
        rate=json_number(found.rate) if quoted else None,
        lower=json_number(found.lower) if quoted else None,
        upper=json_number(found.upper) if quoted else None,
        mean_absolute_error=[float(v) for v in mae] if quoted and mae is not None else None,
        note=note,
    )


def continuous_disagreement_by_change(
    learner_action: np.ndarray,
    expert_action: np.ndarray,
    previous_learner_action: np.ndarray,
    tolerance: np.ndarray,
) -> rates.DisagreementByChange:
    """Continuous counterpart of ``rates.disagreement_by_change``.

    A state is "changed" when the expert's action differs from the learner's previous action
    by more than the tolerance in some dimension. States with a ``nan`` row in the expert or
    previous action are left out of both groups and counted in ``n_excluded``.

    Parameters
    ----------
    learner_action, expert_action, previous_learner_action : ndarray of shape (n, n_dims)
    tolerance : ndarray of shape (n_dims,)
    """
    keep = present(expert_action) & present(previous_learner_action)
    excluded = int((~keep).sum())
    change = np.zeros(len(keep), dtype=bool)
    change[keep] = np.any(
        np.abs(expert_action[keep] - previous_learner_action[keep]) > tolerance, axis=1
    )
    parts = []
    for group in (keep & change, keep & ~change):
        found = rates.continuous_disagreement(
            learner_action[group], expert_action[group], tolerance
        )
        parts.append(
            rates.Disagreement(
                found.count,
                found.n,
                excluded,
                found.rate,
                found.lower,
                found.upper,
                found.mean_absolute_error,
            )
        )
    return rates.DisagreementByChange(changed=parts[0], unchanged=parts[1])


def sample_read(reason: str, arrays: SampleArrays, spec: LoopSpec, minimum: int) -> SampleRead:
    """Disagreement on one sample, overall and split by change of action.

    States without a learner action are left out (their expert answer is treated as missing,
    so they count in ``n_excluded``).
    """
    learner, expert, previous = arrays.learner, arrays.expert.copy(), arrays.previous
    missing_learner = ~present(learner)
    unmatched = int((missing_learner & present(arrays.expert)).sum())
    what = "audit labels" if reason == "audit" else "labels in the ranked sample"
    if spec.is_discrete:
        expert[missing_learner] = -1
        overall = rates.disagreement(learner, expert)
        split = rates.disagreement_by_change(learner, expert, previous)
    else:
        expert[missing_learner] = np.nan
        overall = rates.continuous_disagreement(learner, expert, spec.tolerance)
        split = continuous_disagreement_by_change(learner, expert, previous, spec.tolerance)
    return SampleRead(
        reason="audit" if reason == "audit" else "ranked",
        biased=reason != "audit",
        selected=len(learner),
        disagreement=rate_read(overall, minimum, what, unmatched),
        changed=rate_read(
            split.changed, minimum, what + " where the expert changes action", unmatched
        ),
        unchanged=rate_read(
            split.unchanged, minimum, what + " where the expert keeps action", unmatched
        ),
    )


# --- shift ---------------------------------------------------------------------------------


def _smd_note(found: shift.FeatureShift) -> str | None:
    """Why a feature's standardised mean difference is not a number, or None when it is.

    A feature constant in both samples at different values has zero pooled spread, so the
    difference is infinitely many standard deviations (JSON has no infinity): it is the most
    shifted feature, and the note says so instead of leaving a bare dash.
    """
    if np.isfinite(found.smd):
        return None
    return (
        "constant in both samples at different values (training "
        f"{found.mean_x:.6g}, round {found.mean_y:.6g}): no spread to scale the difference by, "
        "so the standardised difference is unbounded"
    )


def shift_read(
    training: np.ndarray,
    visited: np.ndarray,
    *,
    n_training: int,
    n_round: int,
    feature_names: list[str],
    feature_units: list[str],
    n_permutations: int,
    rng: np.random.Generator,
) -> ShiftRead:
    """MMD permutation test and standardised mean differences of two feature samples.

    Features are standardised with the training sample's mean and standard deviation
    (population, ddof=0; a constant feature is divided by 1) before the MMD, so that no unit
    dominates the kernel distance.

    Parameters
    ----------
    training : ndarray of shape (m, n_features)
        A uniform subsample of the training set before the round.
    visited : ndarray of shape (n, n_features)
        A uniform subsample of the round's learner-controlled states.
    n_training, n_round : int
        Sizes of the full sets the samples were drawn from.
    rng : numpy.random.Generator
        Drives the permutations.
    """

    def empty(note: str) -> ShiftRead:
        return ShiftRead(
            n_training=n_training,
            n_round=n_round,
            n_training_sample=len(training),
            n_round_sample=len(visited),
            n_permutations=0,
            mmd2=None,
            p_value=None,
            bandwidth=None,
            features=[],
            note=note,
        )

    if len(training) < 2:
        return empty("no training set before this round (fewer than two states) to compare with")
    if len(visited) < 2:
        return empty("fewer than two learner-controlled states in this round")
    x, y = training.astype(np.float64), visited.astype(np.float64)
    centre, scale = x.mean(axis=0), x.std(axis=0)
    scale[scale == 0] = 1.0
    try:
        test = shift.mmd_permutation_test(
            (x - centre) / scale,
            (y - centre) / scale,
            n_permutations,
            rng,
            max_samples=len(x) + len(y),
        )
    except ValueError as exc:  # every state identical: the median heuristic has no scale
        return empty(f"no shift statistic: {exc}")
    units = dict(zip(feature_names, feature_units, strict=True))
    shifts = shift.standardised_mean_difference(x, y, feature_names)[:MOST_SHIFTED]
    return ShiftRead(
        n_training=n_training,
        n_round=n_round,
        n_training_sample=len(x),
        n_round_sample=len(y),
        n_permutations=n_permutations,
        mmd2=test.mmd2,
        p_value=test.p_value,
        bandwidth=test.bandwidth,
        features=[
            FeatureShiftRead(
                name=s.name,
                unit=units[s.name],
                smd=json_number(s.smd),
                mean_training=s.mean_x,
                mean_round=s.mean_y,
                pooled_std=s.pooled_std,
                note=_smd_note(s),
            )
            for s in shifts
        ],
    )
