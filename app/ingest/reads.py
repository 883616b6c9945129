"""Read rollouts and steps back for the API, decoding vectors a page at a time."""

from __future__ import annotations

import json
from collections.abc import Sequence
from typing import Any

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from ..errors import NotFound
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
        raise NotFound(f"loop '{loop.slug}' has no rollout '{key}'")
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
    session: Session, *, loop: Loop, step_id: int, seconds: float
) -> tuple[StepRead, list[StepRead], list[StepRead]]:
    """One state of a loop with its rollout's steps within `seconds` before and after it."""
    row = session.execute(
        select(Step.rollout_id, Step.time_s)
        .join(Rollout, Rollout.id == Step.rollout_id)
        .where(Step.id == step_id, Rollout.loop_id == loop.id)
    ).first()
    if row is None:
        raise NotFound(f"loop '{loop.slug}' has no state {step_id}")
    rollout_id, time_s = row
    rows = session.execute(
        select(*_STEP_FIELDS)
        .join(Rollout, Rollout.id == Step.rollout_id)
        .where(
            Step.rollout_id == rollout_id,
            Step.time_s >= time_s - seconds,
            Step.time_s <= time_s + seconds,
        )
        .order_by(Step.step_index)
    ).all()
    steps = decode_steps(rows, spec_of(loop))
    at = next(i for i, s in enumerate(steps) if s.id == step_id)
    return steps[at], steps[:at], steps[at + 1 :]


def decode_steps(rows: Sequence[Any], spec: LoopSpec) -> list[StepRead]:
    """StepRead objects from rows selected with _STEP_FIELDS; features decoded in one call."""
    if not rows:
        return []
    width = spec.n_features
    features = np.frombuffer(b"".join(r.features for r in rows), dtype=FLOAT32_LE).reshape(
        len(rows), width
    )
    out = []
    r: Any
    for r, feats in zip(rows, features.tolist(), strict=True):
        members = _vector(r.learner_ensemble)
        out.append(
            StepRead(
                id=r.id,
                rollout=r.rollout,
                step=r.step_index,
                time_s=r.time_s,
                control="expert" if r.control == CONTROL_EXPERT else "learner",
                features=feats,
                learner_action=_action(r.learner_action, r.learner_action_vec, spec),
                expert_action=_action(r.expert_action, r.expert_action_vec, spec),
                learner_probs=_vector(r.learner_probs),
                learner_ensemble=None
                if members is None
                else np.reshape(np.asarray(members), (r.ensemble_size, -1)).tolist(),
                learner_std=_vector(r.learner_std),
                scene=json.loads(r.scene) if r.scene else None,
                image_sha256=r.image_sha256,
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
