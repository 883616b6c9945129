"""The one definition of the training set, used by export and by the sampler's novelty.

Training set of a loop up to round R = round 0 demonstrations + steps of rounds 1..R where the
expert was in control (takeovers) + consensus relabels of states in rounds 0..R. A cut-off on step
and label ids pins a version: rows added later never change an earlier version.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from app.ingest.encode import FLOAT32_LE
from app.ingest.models import CONTROL_EXPERT, Rollout, Step
from app.loops.models import Loop, Round
from app.queue.models import ANSWER_UNSURE, Label
from app.snapshots.batches import RowBatch, concat, merge_sorted
from app.snapshots.consensus import continuous_consensus, discrete_consensus

SOURCE_DEMONSTRATION = "demonstration"
SOURCE_TAKEOVER = "takeover"
SOURCE_RELABEL = "relabel"
SOURCES = (SOURCE_DEMONSTRATION, SOURCE_TAKEOVER, SOURCE_RELABEL)
# default tolerance of a continuous disagreement, as a fraction of each dimension's range
DEFAULT_TOLERANCE_FRACTION = 0.1
# rows per page read from the store while streaming the training set
DEFAULT_BATCH = 20_000


@dataclass(frozen=True)
class Cutoff:
    """What a training-set version contains: rounds up to `up_to_round`, ids up to the maxima."""

    up_to_round: int
    max_step_id: int
    max_label_id: int


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

    def __len__(self) -> int:
        return len(self.step_id)


def is_discrete(loop: Loop) -> bool:
    return loop.action_space["kind"] == "discrete"


def action_width(loop: Loop) -> int:
    """Actions of a discrete space, or dimensions of a continuous one."""
    space = loop.action_space
    return len(space["actions"]) if is_discrete(loop) else len(space["dimensions"])


def continuous_tolerance(loop: Loop) -> np.ndarray:
    """Per-dimension tolerance: the loop's setting, or 10% of each dimension's range."""
    chosen = loop.settings.get("continuous_tolerance")
    if chosen:
        return np.asarray(chosen, dtype=np.float64)
    dims = loop.action_space["dimensions"]
    return np.array([(d["high"] - d["low"]) * DEFAULT_TOLERANCE_FRACTION for d in dims])


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


def relabels(session: Session, *, loop: Loop, cutoff: Cutoff) -> Relabels:
    """Consensus per labelled state from every label within the cut-off."""
    rows = session.execute(
        select(Label.step_id, Label.answer, Label.action, Label.action_vec)
        .join(Round, Round.id == Label.round_id)
        .where(
            Round.loop_id == loop.id,
            Round.number <= cutoff.up_to_round,
            Label.id <= cutoff.max_label_id,
        )
        .order_by(Label.id)
    ).all()
    width = action_width(loop)
    step_ids = np.array([r[0] for r in rows], dtype=np.int64)
    unique_steps, state_index = np.unique(step_ids, return_inverse=True)
    unsure = np.array([r[1] == ANSWER_UNSURE for r in rows], dtype=bool)
    if is_discrete(loop):
        actions = np.array([-1 if r[2] is None else r[2] for r in rows], dtype=np.int64)
        actions[unsure] = -1
        found = discrete_consensus(state_index, actions, len(unique_steps), width)
        action = found.action
    else:
        values = np.full((len(rows), width), np.nan)
        voted = np.flatnonzero(~unsure)
        if len(voted):
            blob = b"".join(rows[i][3] or b"" for i in voted.tolist())
            values[voted] = np.frombuffer(blob, dtype=FLOAT32_LE).reshape(len(voted), width)
        found_c = continuous_consensus(
            state_index, values, unsure, len(unique_steps), continuous_tolerance(loop)
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


def members(session: Session, *, loop: Loop, cutoff: Cutoff) -> Members:
    """The training set's rows (without features), sorted by step id."""
    parts = list(iter_batches(session, loop=loop, cutoff=cutoff, with_features=False))
    if not parts:
        dtype = np.int64 if is_discrete(loop) else np.float32
        shape = (0,) if is_discrete(loop) else (0, action_width(loop))
        return Members(
            step_id=np.empty(0, np.int64),
            source=np.empty(0, np.int8),
            action=np.empty(shape, dtype),
            label_count=np.empty(0, np.int64),
            agreement=np.empty(0, np.float64),
        )
    rows = concat(parts)
    return Members(
        step_id=rows.step_id,
        source=rows.source,
        action=rows.action,
        label_count=rows.label_count,
        agreement=rows.agreement,
    )


def iter_batches(
    session: Session,
    *,
    loop: Loop,
    cutoff: Cutoff,
    batch: int | None = None,
    with_features: bool = True,
) -> Iterator[RowBatch]:
    """The training set's rows in step-id order, at most 2 x `batch` rows at a time.

    Expert-driven steps (demonstrations in round 0, takeovers later) are read by step id a page
    at a time; relabelled states (resolved consensus on a learner-driven step) are read by id in
    pages of `batch`; the two sorted streams are merged. Memory is bounded by the batch size plus
    the consensus arrays, which grow with the number of labels, not of steps.
    """
    batch = DEFAULT_BATCH if batch is None else batch
    if batch < 1:
        raise ValueError(f"batch must be >= 1, got {batch}")
    rounds = _Rounds.of(session, loop)
    found = relabels(session, loop=loop, cutoff=cutoff)
    keep = found.resolved
    expert = _expert_batches(session, loop, cutoff, rounds, batch, with_features)
    relabelled = _relabel_batches(
        session,
        loop,
        rounds,
        step_ids=found.step_id[keep],
        action=found.action[keep],
        label_count=found.label_count[keep],
        agreement=found.agreement[keep],
        batch=batch,
        with_features=with_features,
    )
    return merge_sorted(expert, relabelled)


@dataclass(frozen=True)
class _Rounds:
    """Round ids of a loop (sorted) with their numbers and learner versions."""

    ids: np.ndarray
    numbers: np.ndarray
    learner_versions: dict[int, str | None]

    @classmethod
    def of(cls, session: Session, loop: Loop) -> _Rounds:
        rows = session.execute(
            select(Round.id, Round.number, Round.learner_version)
            .where(Round.loop_id == loop.id)
            .order_by(Round.id)
        ).all()
        return cls(
            ids=np.array([r[0] for r in rows], dtype=np.int64),
            numbers=np.array([r[1] for r in rows], dtype=np.int64),
            learner_versions={int(r[1]): r[2] for r in rows},
        )

    def number_of(self, round_ids: np.ndarray) -> np.ndarray:
        return self.numbers[np.searchsorted(self.ids, round_ids)]

    def ids_up_to(self, number: int) -> list[int]:
        return self.ids[self.numbers <= number].tolist()


def _step_columns(with_features: bool) -> list[Any]:
    columns: list[Any] = [Step.id, Step.rollout_id, Step.round_id, Step.step_index]
    return columns + [Step.features] if with_features else columns


def _batch_from_rows(
    session: Session,
    loop: Loop,
    rounds: _Rounds,
    columns: list[tuple[Any, ...]],
    with_features: bool,
    **rest: np.ndarray,
) -> RowBatch:
    """A RowBatch from the column tuples of (id, rollout_id, round_id, step_index[, features])."""
    n = len(columns[0])
    rollout_id = np.array(columns[1], dtype=np.int64)
    features = None
    if with_features:
        width = len(loop.features)
        blob = b"".join(columns[4])
        features = np.frombuffer(blob, dtype=FLOAT32_LE).reshape(n, width)
    wanted = np.unique(rollout_id).tolist()
    keys = dict(
        session.execute(select(Rollout.id, Rollout.key).where(Rollout.id.in_(wanted))).all()
    )
    return RowBatch(
        step_id=np.array(columns[0], dtype=np.int64),
        round=rounds.number_of(np.array(columns[2], dtype=np.int64)),
        rollout_id=rollout_id,
        step_index=np.array(columns[3], dtype=np.int64),
        features=features,
        rollout_keys=keys,
        learner_versions=rounds.learner_versions,
        **rest,
    )


def _expert_batches(
    session: Session,
    loop: Loop,
    cutoff: Cutoff,
    rounds: _Rounds,
    batch: int,
    with_features: bool,
) -> Iterator[RowBatch]:
    """Expert-driven steps within the cut-off, a page of `batch` at a time (keyset by id)."""
    discrete = is_discrete(loop)
    action_column = Step.expert_action if discrete else Step.expert_action_vec
    round_ids = rounds.ids_up_to(cutoff.up_to_round)
    demonstration, takeover = SOURCES.index(SOURCE_DEMONSTRATION), SOURCES.index(SOURCE_TAKEOVER)
    after = 0
    while True:
        rows = session.execute(
            select(*_step_columns(with_features), action_column)
            .where(
                Step.round_id.in_(round_ids),
                Step.control == CONTROL_EXPERT,
                Step.id > after,
                Step.id <= cutoff.max_step_id,
            )
            .order_by(Step.id)
            .limit(batch)
        ).all()
        if not rows:
            return
        columns = list(zip(*rows, strict=True))
        n = len(rows)
        action: np.ndarray
        if discrete:
            action = np.array(columns[-1], dtype=np.int64)
        else:
            blob = b"".join(columns[-1])
            action = np.frombuffer(blob, dtype=FLOAT32_LE).reshape(n, action_width(loop))
        found = _batch_from_rows(
            session,
            loop,
            rounds,
            columns[:-1],
            with_features,
            source=np.zeros(n, np.int8),
            action=action,
            label_count=np.ones(n, np.int64),
            agreement=np.ones(n, np.float64),
        )
        found.source = np.where(found.round == 0, demonstration, takeover).astype(np.int8)
        yield found
        after = int(found.step_id[-1])


def _relabel_batches(
    session: Session,
    loop: Loop,
    rounds: _Rounds,
    *,
    step_ids: np.ndarray,
    action: np.ndarray,
    label_count: np.ndarray,
    agreement: np.ndarray,
    batch: int,
    with_features: bool,
) -> Iterator[RowBatch]:
    """Learner-driven steps with a resolved consensus, `batch` ids at a time.

    Labels on an expert-driven step cannot arise (such steps are never queued); if one did, the
    expert's own action wins and the step is read only by the expert stream.
    """
    dtype = np.int64 if is_discrete(loop) else np.float32
    relabel = SOURCES.index(SOURCE_RELABEL)
    for start in range(0, len(step_ids), batch):
        chunk = step_ids[start : start + batch]
        rows = session.execute(
            select(*_step_columns(with_features))
            .where(Step.id.in_(chunk.tolist()), Step.control != CONTROL_EXPERT)
            .order_by(Step.id)
        ).all()
        if not rows:
            continue
        columns = list(zip(*rows, strict=True))
        at = start + np.searchsorted(chunk, np.array(columns[0], dtype=np.int64))
        yield _batch_from_rows(
            session,
            loop,
            rounds,
            columns,
            with_features,
            source=np.full(len(rows), relabel, np.int8),
            action=action[at].astype(dtype),
            label_count=label_count[at].astype(np.int64),
            agreement=agreement[at].astype(np.float64),
        )


StepRow = tuple[int, bytes, int, str, int, str | None]


def iter_step_rows(
    session: Session, *, step_ids: np.ndarray, batch: int = 10_000
) -> Iterator[list[StepRow]]:
    """Rows (id, features, round number, rollout key, step index, learner version) of the given
    sorted step ids, a batch at a time in id order, so callers can stream in bounded memory."""
    for start in range(0, len(step_ids), batch):
        chunk = step_ids[start : start + batch]
        rows = session.execute(
            select(
                Step.id,
                Step.features,
                Round.number,
                Rollout.key,
                Step.step_index,
                Round.learner_version,
            )
            .join(Round, Round.id == Step.round_id)
            .join(Rollout, Rollout.id == Step.rollout_id)
            .where(Step.id.in_(chunk.tolist()))
            .order_by(Step.id)
        ).all()
        yield [(r[0], r[1], r[2], r[3], r[4], r[5]) for r in rows]


def training_features(
    session: Session, *, loop: Loop, cutoff: Cutoff
) -> tuple[np.ndarray, np.ndarray]:
    """Step ids (n,) and float32 features (n, n_features) of the training set."""
    parts = list(iter_batches(session, loop=loop, cutoff=cutoff))
    if not parts:
        return np.empty(0, np.int64), np.empty((0, len(loop.features)), np.float32)
    ids = np.concatenate([p.step_id for p in parts])
    features = np.concatenate([p.features for p in parts if p.features is not None])
    return ids, features.astype(np.float32, copy=False)
