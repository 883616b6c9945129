"""The one definition of the training set, used by export and by the sampler's novelty.

Training set of a loop up to round R = round 0 demonstrations + steps of rounds 1..R where the
expert was in control (takeovers) + consensus relabels of states in rounds 0..R. A cut-off on step
and label ids pins a version: rows added later never change an earlier version.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from ..ingest.models import Step
from ..loops.models import Loop, Round
from ..queue.models import ANSWER_UNSURE, Label
from . import training_rows as rows
from .bulk_reads import bulk_reader
from .consensus import continuous_consensus, discrete_consensus, one_vote_each
from .current import is_current
from .encode import stored_actions
from .row_batches import (
    SOURCE_DEMONSTRATION,
    SOURCE_RELABEL,
    SOURCE_TAKEOVER,
    SOURCES,
    RowBatch,
    concat,
    merge_sorted,
)
from .training_rows import LoopShape

__all__ = [
    "SOURCES",
    "SOURCE_DEMONSTRATION",
    "SOURCE_RELABEL",
    "SOURCE_TAKEOVER",
    "Cutoff",
    "LoopShape",
    "Members",
    "Relabels",
    "current_cutoff",
    "iter_batches",
    "members",
    "relabels",
    "training_features",
]
# rows per page read from the store while streaming the training set
DEFAULT_BATCH = 8192


@dataclass(frozen=True)
class Cutoff:
    """What a training-set version contains: rounds up to `up_to_round`, ids up to the maxima."""

    up_to_round: int
    max_step_id: int
    max_label_id: int
    # one vote per annotator and state (consensus.one_vote_each); versions and rankings made
    # before that rule counted every label, and must read their rows as they did
    one_vote_each: bool = True


@dataclass
class Relabels:
    """Consensus of the labels on each labelled state (arrays share the first axis).

    step_id : ndarray of shape (n,), sorted
    action : discrete, ndarray (n,) int with -1 where unresolved; continuous, (n, n_dims) float
    """

    step_id: np.ndarray
    action: np.ndarray
    label_count: np.ndarray
    vote_count: np.ndarray
    agreement: np.ndarray
    resolved: np.ndarray


@dataclass
class Members:
    """Which steps are in the training set and with which action, sorted by step id."""

    step_id: np.ndarray
    source: np.ndarray  # (n,) indexes into SOURCES
    action: np.ndarray  # (n,) int or (n, n_dims) float32
    label_count: np.ndarray
    agreement: np.ndarray
    round: np.ndarray  # (n,) round number of each step

    def __len__(self) -> int:
        return len(self.step_id)


def current_cutoff(session: Session, *, loop: Loop, up_to_round: int) -> Cutoff:
    """The cut-off that pins everything stored now."""
    max_step = session.scalar(
        select(func.max(Step.id))
        .join(Round, Round.id == Step.round_id)
        .where(Round.loop_id == loop.id, Round.number <= up_to_round)
    )
    max_label = session.scalar(
        select(func.max(Label.id))
        .join(Round, Round.id == Label.round_id)
        .where(Round.loop_id == loop.id, Round.number <= up_to_round)
    )
    return Cutoff(up_to_round, int(max_step or 0), int(max_label or 0))


def relabels(session: Session, *, loop: Loop, spec: LoopShape, cutoff: Cutoff) -> Relabels:
    """Consensus per labelled state from every label within the cut-off (`spec`: the loop's)."""
    query = (
        select(
            Label.step_id, Label.answer, Label.action, Label.action_vec, Label.user_id, Label.span
        )
        .join(Round, Round.id == Label.round_id)
        .where(
            Round.loop_id == loop.id,
            Round.number <= cutoff.up_to_round,
            Label.id <= cutoff.max_label_id,
            is_current(cutoff.max_label_id),  # a later correction or undo counts from its id on
        )
        .order_by(Label.id)
    )
    # on the session's connection, as plain rows: through the ORM, 20,000 labels took
    # 0.065-0.1 s here against 0.03 s, and every snapshot and export reads them
    rows = session.connection().execute(query).all()
    width = spec.action_width
    # columns by position (a Row's lookup by name costs many times its lookup by index)
    step_col, answer_col, action_col, vector_col, user_col, span_col = (
        zip(*rows, strict=True) if rows else ((),) * 6
    )
    step_ids = np.array(step_col, dtype=np.int64)
    unsure = np.array(answer_col, dtype=object) == ANSWER_UNSURE
    discrete = spec.is_discrete
    actions = stored_actions(action_col, vector_col, discrete=discrete, width=width)
    if cutoff.one_vote_each and rows:
        votes = one_vote_each(step_ids, np.array(user_col, np.int64), np.array(span_col, bool))
        step_ids, unsure, actions = step_ids[votes], unsure[votes], actions[votes]
    unique_steps, state_index = np.unique(step_ids, return_inverse=True)
    actions[unsure] = -1 if discrete else np.nan  # unsure answers do not vote
    if discrete:
        found = discrete_consensus(state_index, actions, len(unique_steps), width)
        action = found.action
    else:
        found_c = continuous_consensus(
            state_index, actions, unsure, len(unique_steps), spec.tolerance
        )
        return Relabels(
            unique_steps,
            found_c.median,
            found_c.label_count,
            found_c.vote_count,
            found_c.agreement,
            found_c.resolved,
        )
    return Relabels(
        unique_steps, action, found.label_count, found.vote_count, found.agreement, found.resolved
    )


def members(session: Session, *, loop: Loop, spec: LoopShape, cutoff: Cutoff) -> Members:
    """The training set's rows (without features), sorted by step id."""
    parts = list(iter_batches(session, loop=loop, spec=spec, cutoff=cutoff, with_features=False))
    if not parts:
        dtype = np.int64 if spec.is_discrete else np.float32
        shape = (0,) if spec.is_discrete else (0, spec.action_width)
        return Members(
            step_id=np.empty(0, np.int64),
            source=np.empty(0, np.int8),
            action=np.empty(shape, dtype),
            label_count=np.empty(0, np.int64),
            agreement=np.empty(0, np.float64),
            round=np.empty(0, np.int64),
        )
    rows = concat(parts)
    return Members(
        step_id=rows.step_id,
        source=rows.source,
        action=rows.action,
        label_count=rows.label_count,
        agreement=rows.agreement,
        round=rows.round,
    )


def iter_batches(
    session: Session,
    *,
    loop: Loop,
    spec: LoopShape,
    cutoff: Cutoff,
    batch: int | None = None,
    with_features: bool = True,
) -> Iterator[RowBatch]:
    """The training set's rows in step-id order, a bounded number of rows at a time.

    Expert-driven steps (demonstrations in round 0, takeovers later) are read `batch` rows at a
    time per round, as columns (app.shared.bulk_reads); relabelled states (resolved consensus on a
    learner-driven step) `batch` ids at a time; the sorted streams are merged. A yielded batch
    holds at most (rounds + 1) x `batch` rows and usually about `batch`. Memory holds one page
    per stream plus the consensus arrays, which grow with the number of labels, not of steps.
    """
    batch = DEFAULT_BATCH if batch is None else batch
    if batch < 1:
        raise ValueError(f"batch must be >= 1, got {batch}")
    rounds = rows.RoundTable.of(session, loop.id)
    found = relabels(session, loop=loop, spec=spec, cutoff=cutoff)
    return _merged(session, spec, cutoff, rounds, found, batch, with_features)


def _merged(
    session: Session,
    spec: LoopShape,
    cutoff: Cutoff,
    rounds: rows.RoundTable,
    found: Relabels,
    batch: int,
    with_features: bool,
) -> Iterator[RowBatch]:
    """The two sorted streams merged, read on one bulk reader closed when the stream ends."""
    keep = found.resolved
    keys = rows.RolloutKeys(session)  # one pass: the streams below take turns on it
    with bulk_reader(session) as reader:
        expert = rows.expert_batches(
            reader,
            keys=keys,
            shape=spec,
            rounds=rounds,
            up_to_round=cutoff.up_to_round,
            max_step_id=cutoff.max_step_id,
            batch=batch,
            with_features=with_features,
        )
        relabelled = rows.relabel_batches(
            reader,
            keys=keys,
            shape=spec,
            rounds=rounds,
            step_ids=found.step_id[keep],
            action=found.action[keep],
            label_count=found.label_count[keep],
            agreement=found.agreement[keep],
            batch=batch,
            with_features=with_features,
        )
        yield from merge_sorted(expert, relabelled)


def training_features(
    session: Session, *, loop: Loop, spec: LoopShape, cutoff: Cutoff
) -> tuple[np.ndarray, np.ndarray]:
    """Step ids (n,) and float32 features (n, n_features) of the training set."""
    parts = list(iter_batches(session, loop=loop, spec=spec, cutoff=cutoff))
    if not parts:
        return np.empty(0, np.int64), np.empty((0, spec.n_features), np.float32)
    ids = np.concatenate([p.step_id for p in parts])
    features = np.concatenate([p.features for p in parts if p.features is not None])
    return ids, features.astype(np.float32, copy=False)
