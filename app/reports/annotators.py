"""Annotator sections of the round report: agreement, agreement with consensus, pace, and the
effect of showing the learner's action. Pure functions over ``compute.LabelArrays``."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..loops.spec import LoopSpec
from ..shared.pace import labels_per_hour
from . import agreement, rates
from .compute import LabelArrays, json_number, present
from .schemas import (
    AgreementRead,
    AlphaRead,
    AnnotatorRead,
    PaceRead,
    ShownHiddenRead,
)


@dataclass(frozen=True)
class _MultiVotes:
    """Votes on states with at least two, one per (annotator, state): the last one given."""

    annotator: NDArray[np.int64]  # index into annotators
    annotators: NDArray[np.int64]  # user ids
    unit: NDArray[np.int64]  # index into states
    states: NDArray[np.int64]  # index into the consensus arrays
    action: np.ndarray


def _multi_votes(labels: LabelArrays) -> _MultiVotes:
    voted = np.flatnonzero(labels.voted())
    # keep the last vote of an annotator on a state (the queue allows one; be safe anyway)
    pair = np.stack([labels.state[voted], labels.annotator[voted]], axis=1)
    _, first_from_end = np.unique(pair[::-1], axis=0, return_index=True)
    voted = np.sort(voted[::-1][first_from_end])
    per_state = np.bincount(labels.state[voted], minlength=len(labels.consensus))
    voted = voted[per_state[labels.state[voted]] >= 2]
    annotators, who = np.unique(labels.annotator[voted], return_inverse=True)
    states, unit = np.unique(labels.state[voted], return_inverse=True)
    return _MultiVotes(
        who.astype(np.int64),
        annotators.astype(np.int64),
        unit.astype(np.int64),
        states.astype(np.int64),
        labels.action[voted],
    )


def agreement_read(labels: LabelArrays, spec: LoopSpec) -> AgreementRead:
    """Cohen, Fleiss and Krippendorff agreement on states with at least two votes.

    Unsure answers are not votes and are left out. Cohen's kappa is given when exactly two
    annotators voted on these states (then every such state has both their votes); Fleiss'
    kappa when every such state has the same number of votes; Krippendorff's alpha always
    (nominal for discrete actions, interval per dimension for continuous ones).
    """
    votes = _multi_votes(labels)
    n_states, n_annotators = len(votes.states), len(votes.annotators)
    if n_states == 0:
        alphas = [AlphaRead(dimension=None, level="nominal", alpha=None)]
        if not spec.is_discrete:
            alphas = [
                AlphaRead(dimension=d, level="interval", alpha=None) for d in spec.action_names
            ]
        return AgreementRead(
            n_states=0,
            n_annotators=0,
            n_votes=0,
            cohen_kappa=None,
            fleiss_kappa=None,
            krippendorff=alphas,
            note="no state has two or more votes, so annotator agreement cannot be measured",
        )
    per_state = np.bincount(votes.unit, minlength=n_states)
    cohen = fleiss = None
    if spec.is_discrete:
        reliability = np.full((n_annotators, n_states), np.nan)
        reliability[votes.annotator, votes.unit] = votes.action
        if n_annotators == 2:
            cohen = json_number(
                agreement.cohen_kappa(
                    reliability[0].astype(np.int64),
                    reliability[1].astype(np.int64),
                    spec.action_width,
                )
            )
        if np.all(per_state == per_state[0]):
            table = np.bincount(
                votes.unit * spec.action_width + votes.action,
                minlength=n_states * spec.action_width,
            ).reshape(n_states, spec.action_width)
            fleiss = json_number(agreement.fleiss_kappa(table))
        alphas = [
            AlphaRead(
                dimension=None,
                level="nominal",
                alpha=json_number(agreement.krippendorff_alpha(reliability, "nominal")),
            )
        ]
    else:
        alphas = []
        for d, name in enumerate(spec.action_names):
            reliability = np.full((n_annotators, n_states), np.nan)
            reliability[votes.annotator, votes.unit] = votes.action[:, d]
            alpha = agreement.krippendorff_alpha(reliability, "interval")
            alphas.append(AlphaRead(dimension=name, level="interval", alpha=json_number(alpha)))
    return AgreementRead(
        n_states=n_states,
        n_annotators=n_annotators,
        n_votes=len(votes.unit),
        cohen_kappa=cohen,
        fleiss_kappa=fleiss,
        krippendorff=alphas,
        note=_undefined_note(
            votes,
            spec,
            cohen_applies=spec.is_discrete and n_annotators == 2,
            fleiss_applies=spec.is_discrete and bool(np.all(per_state == per_state[0])),
            cohen=cohen,
            fleiss=fleiss,
            alphas=alphas,
        ),
    )


def _undefined_note(
    votes: _MultiVotes,
    spec: LoopSpec,
    *,
    cohen_applies: bool,
    fleiss_applies: bool,
    cohen: float | None,
    fleiss: float | None,
    alphas: list[AlphaRead],
) -> str | None:
    """Why a statistic that applies came out undefined, or None when none did.

    With at least one state of two votes, the kappas and alpha are undefined only when the
    votes do not vary (chance agreement is then already perfect): say so, or a reader sees a
    dash where the annotators in fact agreed on every state.
    """
    missing = []
    if cohen_applies and cohen is None:
        missing.append("Cohen's kappa")
    if fleiss_applies and fleiss is None:
        missing.append("Fleiss' kappa")
    missing += [
        "Krippendorff's alpha" + (f" ({a.dimension})" if a.dimension else "")
        for a in alphas
        if a.alpha is None
    ]
    if not missing:
        return None
    what = "action" if spec.is_discrete else "value in that dimension"
    return (
        f"{', '.join(missing)} undefined: all {len(votes.unit)} votes on the "
        f"{len(votes.states)} states with two or more votes give the same {what}, so chance "
        "agreement is already perfect and agreement beyond chance cannot be measured"
    )


def annotators_read(
    labels: LabelArrays, spec: LoopSpec, names: Mapping[int, str]
) -> list[AnnotatorRead]:
    """Per annotator: labels given, agreement with consensus on multi-vote states, pace.

    For continuous actions a vote agrees when it lies within the tolerance of the consensus
    median in every dimension.
    """
    votes = _multi_votes(labels)
    target = labels.consensus[votes.states]
    action = votes.action
    if not spec.is_discrete:  # recode as 1 = within tolerance of the median, against target 1
        within = np.all(np.abs(votes.action - target[votes.unit]) <= spec.tolerance, axis=1)
        action = within.astype(np.int64)
        target = np.where(present(target), 1, -1)
    found = agreement.agreement_with_consensus(
        votes.annotators[votes.annotator], votes.unit, action, target
    )
    by_user = {
        int(u): (int(c), int(a), float(f))
        for u, c, a, f in zip(
            found.annotator_ids, found.n_compared, found.n_agreeing, found.fraction, strict=True
        )
    }
    rows = []
    for user in np.unique(labels.annotator).tolist():
        mine = labels.annotator == user
        pace = labels_per_hour(labels.created_s[mine])
        compared, agreeing, fraction = by_user.get(user, (0, 0, float("nan")))
        rows.append(
            AnnotatorRead(
                name=names.get(user, f"user {user}"),
                labels=int(mine.sum()),
                compared=compared,
                agreeing=agreeing,
                agreement=json_number(fraction),
                labels_per_hour=json_number(pace.labels_per_hour),
            )
        )
    return rows


def pace_read(labels: LabelArrays) -> PaceRead:
    """Labels per active person-hour over all the round's answers (unsure ones included)."""
    pace = labels_per_hour(labels.created_s, labels.annotator)
    return PaceRead(
        labels=pace.n_labels,
        timed_labels=pace.timed_labels,
        active_hours=pace.active_hours,
        labels_per_hour=json_number(pace.labels_per_hour),
    )


def shown_hidden_read(labels: LabelArrays, spec: LoopSpec) -> ShownHiddenRead:
    """Agreement with the learner's action when the bench showed it versus when it did not.

    Votes on states without a learner action are left out.
    """
    keep = labels.voted() & present(labels.learner_action)
    action, learner = labels.action[keep], labels.learner_action[keep]
    if spec.is_discrete:
        agree = np.asarray(action == learner)
    else:
        agree = np.all(np.abs(action - learner) <= spec.tolerance, axis=1)
    found = rates.shown_vs_hidden_effect(agree.astype(bool), labels.learner_shown[keep])
    note = None
    if found.n_shown == 0 or found.n_hidden == 0:
        note = (
            "needs labels both with the learner's action shown and hidden "
            f"({found.n_shown} shown, {found.n_hidden} hidden)"
        )
    return ShownHiddenRead(
        n_shown=found.n_shown,
        n_hidden=found.n_hidden,
        rate_shown=json_number(found.rate_shown),
        rate_hidden=json_number(found.rate_hidden),
        difference=json_number(found.difference),
        lower=json_number(found.lower),
        upper=json_number(found.upper),
        note=note,
    )
