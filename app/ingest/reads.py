"""Read rollouts and steps back for the API, decoding vectors a page at a time."""

from __future__ import annotations

import json
from collections.abc import Sequence
from functools import cache
from operator import itemgetter
from typing import Any

import numpy as np
from sqlalchemy import Float, Integer, Select, bindparam, func, select
from sqlalchemy.orm import Session, aliased

from ..errors import NotFound
from ..limits import shown
from ..loops.models import Loop, Round
from ..loops.spec import LoopSpec, spec_of
from ..shared.encode import FLOAT32_LE
from .models import CONTROL_EXPERT, Rollout, Step
from .schemas import RolloutRead, StepRead

_STEP_FIELDS = (
    Step.id,
    Rollout.key.label("rollout"),
    Step.step_index,
    Step.time_s,
    Step.control,
    Step.features,
    Step.learner_action,
    Step.learner_action_vec,
    Step.expert_action,
    Step.expert_action_vec,
    Step.learner_probs,
    Step.learner_ensemble,
    Step.ensemble_size,
    Step.learner_std,
    Step.scene,
    Step.image_sha256,
)


def list_rollouts(
    session: Session, *, rnd: Round, offset: int, limit: int
) -> tuple[list[RolloutRead], int]:
    """A page of a round's rollouts, and how many there are."""
    total = session.scalar(
        select(func.count()).select_from(Rollout).where(Rollout.round_id == rnd.id)
    )
    rows = session.scalars(
        select(Rollout)
        .where(Rollout.round_id == rnd.id)
        .order_by(Rollout.key)
        .offset(offset)
        .limit(limit)
    )
    items = [
        RolloutRead(
            key=r.key, round=rnd.number, robot=r.robot, steps=r.n_steps, created_at=r.created_at
        )
        for r in rows
    ]
    return items, int(total or 0)


def get_rollout(session: Session, *, loop: Loop, key: str) -> Rollout:
    """A loop's rollout by key, or NotFound."""
    found = session.scalar(select(Rollout).where(Rollout.loop_id == loop.id, Rollout.key == key))
    if found is None:
        raise NotFound(f"loop '{loop.slug}' has no rollout '{shown(key)}'")
    return found


def list_steps(
    session: Session, *, loop: Loop, rollout: Rollout, offset: int, limit: int
) -> list[StepRead]:
    """A page of a rollout's steps in step order."""
    rows = session.execute(
        select(*_STEP_FIELDS)
        .join(Rollout, Rollout.id == Step.rollout_id)
        .where(Step.rollout_id == rollout.id)
        .order_by(Step.step_index)
        .offset(offset)
        .limit(limit)
    ).all()
    return decode_steps(rows, spec_of(loop))


def state_with_context(
    session: Session, *, loop: Loop, step_id: int, seconds: float, after: bool = True
) -> tuple[StepRead, list[StepRead], list[StepRead]]:
    """One state of a loop with its rollout's steps within `seconds` before and after it (none
    after it with `after` False: the bench shows only what came before, and decoding the steps
    after would be half of its read)."""
    params = {"step_id": step_id, "loop_id": loop.id, "seconds": seconds}
    # plain rows, no ORM objects: on the session's connection the ORM's per-statement work
    # (a quarter of this read) is skipped
    rows = session.connection().execute(_window_query(after), params).all()
    if not rows:
        raise NotFound(f"loop '{loop.slug}' has no state {step_id}")
    steps = decode_steps(rows, spec_of(loop))
    at = next(i for i, s in enumerate(steps) if s.id == step_id)
    return steps[at], steps[:at], steps[at + 1 :]


@cache
def _window_query(after: bool) -> Select[*tuple[Any, ...]]:
    """The steps of :step_id's rollout within :seconds of it (`after`: on both sides; else up
    to it), in step order, if the rollout belongs to loop :loop_id (else none): one round trip,
    built once (every claim runs it)."""
    anchor = aliased(Step)
    seconds = bindparam("seconds", type_=Float)
    until = (
        Step.time_s <= anchor.time_s + seconds if after else Step.step_index <= anchor.step_index
    )
    return (
        select(*_STEP_FIELDS)
        .join(Rollout, Rollout.id == Step.rollout_id)
        .join(anchor, anchor.rollout_id == Step.rollout_id)
        .where(
            anchor.id == bindparam("step_id", type_=Integer),
            Rollout.loop_id == bindparam("loop_id", type_=Integer),
            Step.time_s >= anchor.time_s - seconds,
            until,
        )
        .order_by(Step.step_index)
    )


# What decode_steps reads from a row, in the order it unpacks them: every selected field but the
# features, which are decoded for all rows at once. Each call looks these names up once and then
# picks the values by position: a Row's lookup by name costs about 20 times its lookup by index,
# which was most of a bench claim's decoding.
_DECODED = tuple(field.key for field in _STEP_FIELDS if field.key != "features")


def decode_steps(rows: Sequence[Any], spec: LoopSpec) -> list[StepRead]:
    """StepRead objects from rows selected with _STEP_FIELDS; features decoded in one call."""
    if not rows:
        return []
    position = {name: i for i, name in enumerate(rows[0]._fields)}
    pick = itemgetter(*(position[name] for name in _DECODED))
    at_features = position["features"]
    features = np.frombuffer(b"".join(r[at_features] for r in rows), dtype=FLOAT32_LE).reshape(
        len(rows), spec.n_features
    )
    out = []
    for values, feats in zip(map(pick, rows), features.tolist(), strict=True):
        (
            step_id,
            rollout,
            step_index,
            time_s,
            control,
            learner_index,
            learner_vec,
            expert_index,
            expert_vec,
            probs,
            ensemble,
            ensemble_size,
            std,
            scene,
            image_sha256,
        ) = values
        members = _vector(ensemble)
        out.append(
            StepRead(
                id=step_id,
                rollout=rollout,
                step=step_index,
                time_s=time_s,
                control="expert" if control == CONTROL_EXPERT else "learner",
                features=feats,
                learner_action=_action(learner_index, learner_vec, spec),
                expert_action=_action(expert_index, expert_vec, spec),
                learner_probs=_vector(probs),
                learner_ensemble=None
                if members is None
                else np.reshape(np.asarray(members), (ensemble_size, -1)).tolist(),
                learner_std=_vector(std),
                scene=json.loads(scene) if scene else None,
                image_sha256=image_sha256,
            )
        )
    return out


def _vector(blob: bytes | None) -> list[float] | None:
    return None if blob is None else np.frombuffer(blob, dtype=FLOAT32_LE).tolist()


def _action(index: int | None, blob: bytes | None, spec: LoopSpec) -> str | list[float] | None:
    if spec.is_discrete:
        return None if index is None else spec.action_names[index]
    return _vector(blob)


def steps_by_id(session: Session, *, loop: Loop, step_ids: Sequence[int]) -> dict[int, StepRead]:
    """Steps of a loop by id (ids of other loops are left out)."""
    if not step_ids:
        return {}
    rows = session.execute(
        select(*_STEP_FIELDS)
        .join(Rollout, Rollout.id == Step.rollout_id)
        .where(Step.id.in_(list(step_ids)), Rollout.loop_id == loop.id)
    ).all()
    return {s.id: s for s in decode_steps(rows, spec_of(loop))}
