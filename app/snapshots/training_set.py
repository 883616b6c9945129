"""The one definition of the training set, used by export and by the sampler's novelty.

Training set of a loop up to round R = round 0 demonstrations + steps of rounds 1..R where the
expert was in control (takeovers) + consensus relabels of states in rounds 0..R. A cut-off on step
and label ids pins a version: rows added later never change an earlier version.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
from sqlalchemy import Select, func, select
from sqlalchemy.orm import Session

from app.ingest.encode import FLOAT32_LE
from app.ingest.models import CONTROL_EXPERT, Rollout, Step
from app.loops.models import Loop, Round
from app.queue.models import ANSWER_UNSURE, Label
from app.snapshots.consensus import continuous_consensus, discrete_consensus

SOURCE_DEMONSTRATION = "demonstration"
SOURCE_TAKEOVER = "takeover"
SOURCE_RELABEL = "relabel"
SOURCES = (SOURCE_DEMONSTRATION, SOURCE_TAKEOVER, SOURCE_RELABEL)
# default tolerance of a continuous disagreement, as a fraction of each dimension's range
DEFAULT_TOLERANCE_FRACTION = 0.1


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


def _expert_steps(loop: Loop, cutoff: Cutoff) -> Select:  # type: ignore[type-arg]
    return (
        select(Step.id, Step.expert_action, Step.expert_action_vec, Round.number)
        .join(Round, Round.id == Step.round_id)
        .where(
            Round.loop_id == loop.id,
            Round.number <= cutoff.up_to_round,
            Step.control == CONTROL_EXPERT,
            Step.id <= cutoff.max_step_id,
        )
        .order_by(Step.id)
    )


def members(session: Session, *, loop: Loop, cutoff: Cutoff) -> Members:
    """The training set's rows (without features), sorted by step id."""
    width = action_width(loop)
    expert = session.execute(_expert_steps(loop, cutoff)).all()
    expert_ids = np.array([r[0] for r in expert], dtype=np.int64)
    expert_source = np.array(
        [SOURCES.index(SOURCE_DEMONSTRATION if r[3] == 0 else SOURCE_TAKEOVER) for r in expert],
        dtype=np.int8,
    )
    expert_action: np.ndarray
    if is_discrete(loop):
        expert_action = np.array([r[1] for r in expert], dtype=np.int64)
    else:
        blob = b"".join(r[2] for r in expert)
        expert_action = np.frombuffer(blob, dtype=FLOAT32_LE).reshape(len(expert), width)
    found = relabels(session, loop=loop, cutoff=cutoff)
    # a label on an expert-driven step cannot happen (they are never queued); keep expert rows
    keep = found.resolved & ~np.isin(found.step_id, expert_ids)
    step_id = np.concatenate([expert_ids, found.step_id[keep]])
    order = np.argsort(step_id, kind="stable")
    dtype = np.int64 if is_discrete(loop) else np.float32
    action = np.concatenate([expert_action.astype(dtype), found.action[keep].astype(dtype)])
    return Members(
        step_id=step_id[order],
        source=np.concatenate(
            [expert_source, np.full(int(keep.sum()), SOURCES.index(SOURCE_RELABEL), np.int8)]
        )[order],
        action=action[order],
        label_count=np.concatenate([np.ones(len(expert_ids), np.int64), found.label_count[keep]])[
            order
        ],
        agreement=np.concatenate([np.ones(len(expert_ids)), found.agreement[keep]])[order],
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
    rows = members(session, loop=loop, cutoff=cutoff)
    width = len(loop.features)
    features = np.empty((len(rows), width), dtype=np.float32)
    at = 0
    for batch in iter_step_rows(session, step_ids=rows.step_id):
        blob = b"".join(r[1] for r in batch)
        features[at : at + len(batch)] = np.frombuffer(blob, dtype=FLOAT32_LE).reshape(-1, width)
        at += len(batch)
    return rows.step_id, features
