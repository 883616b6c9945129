"""What the bench shows for a claimed item, built from the ingest reads."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from ..ingest import reads
from ..ingest.schemas import StepRead
from ..loops.models import Loop
from ..loops.spec import LoopSpec, spec_of
from ..shared.current import is_current
from ..shared.encode import FLOAT32_LE
from .models import ANSWER_ACTION, Label
from .schemas import BenchItem, BenchStep
from .service import Claim


def bench_step(step: StepRead, *, commands: str = "none") -> BenchStep:
    """A step as the bench shows it: no learner outputs, and past commands only as allowed.

    commands : "none", "expert" (the expert's command on takeover steps) or "all" (the
    learner's command too); only ever passed for steps before the state being labelled.
    """
    # the validating constructor: pydantic's model_construct, in Python, costs twice as much
    return BenchStep(
        id=step.id,
        rollout=step.rollout,
        step=step.step,
        time_s=step.time_s,
        control=step.control,
        features=step.features,
        scene=step.scene,
        image_sha256=step.image_sha256,
        expert_command=step.expert_action if commands in ("expert", "all") else None,
        learner_command=step.learner_action if commands == "all" else None,
    )


@dataclass(frozen=True)
class Start:
    """Where a continuous answer starts, and what it is."""

    action: list[float] | None
    source: str  # neutral | expert | yours | learner
    step: int | None = None


def neutral_action(low: np.ndarray, high: np.ndarray) -> list[float]:
    """0 in each dimension whose bounds (low, high: shape (n_dims,)) hold it (no motion), else
    the middle of the range."""
    return [float(v) for v in np.where((low <= 0.0) & (0.0 <= high), 0.0, (low + high) / 2)]


def start_action(
    spec: LoopSpec,
    *,
    before: list[StepRead],
    learner: list[float] | None,
    own: tuple[int, list[float]] | None,
) -> Start:
    """The loop's documented starting point for a continuous answer (`continuous_start`).

    previous: the expert's command on the step just before (a takeover), else the annotator's
    own answer on the nearest earlier step of the context; learner: the learner's action where
    the item shows it. Anything missing falls back to neutral.
    """
    settings = spec.settings
    if settings.continuous_start == "previous":
        last = before[-1] if before else None
        if last is not None and isinstance(last.expert_action, list):
            return Start(last.expert_action, "expert", last.step)
        if own is not None:
            return Start(own[1], "yours", own[0])
    if settings.continuous_start == "learner" and learner is not None:
        return Start(learner, "learner")
    return Start(neutral_action(spec.low, spec.high), "neutral")


def _own_answer(
    session: Session, *, user_id: int, before: list[StepRead]
) -> tuple[int, list[float]] | None:
    """(step index, action) of the user's standing answer on the latest earlier step, if any."""
    if not before:
        return None
    rows = session.execute(
        select(Label.step_id, Label.action_vec).where(
            Label.step_id.in_([s.id for s in before]),
            Label.user_id == user_id,
            Label.answer == ANSWER_ACTION,
            Label.action_vec.is_not(None),
            is_current(),
        )
    ).all()
    answered: dict[int, bytes] = {
        int(r.step_id): r.action_vec for r in rows if r.action_vec is not None
    }
    for step in reversed(before):
        if step.id in answered:
            vector = np.frombuffer(answered[step.id], dtype=FLOAT32_LE).astype(float)
            return step.step, [float(v) for v in vector]
    return None


def bench_item(session: Session, *, loop: Loop, claim: Claim, user_id: int) -> BenchItem:
    """The claimed state with the preceding `context_seconds` of its rollout.

    Only steps before the state are sent: later steps would show what the learner did next.
    """
    spec = spec_of(loop)
    settings = spec.settings
    state, before, _ = reads.state_with_context(
        session,
        loop=loop,
        step_id=claim.item.step_id,
        seconds=settings.context_seconds,
        after=False,
    )
    shown = claim.item.show_learner
    start = Start(None, "")
    if not spec.is_discrete:
        start = start_action(
            spec,
            before=before,
            learner=state.learner_action
            if shown and isinstance(state.learner_action, list)
            else None,
            own=_own_answer(session, user_id=user_id, before=before)
            if settings.continuous_start == "previous"
            else None,
        )
    return BenchItem(
        item_id=claim.item.id,
        lease_expires_at=claim.expires_at,
        lease_seconds=settings.lease_seconds,
        state=bench_step(state),
        context=[bench_step(s, commands=settings.context_commands) for s in before],
        context_seconds=settings.context_seconds,
        learner_shown=shown,
        learner_action=state.learner_action if shown else None,
        span_max_steps=min(settings.span_max_steps, len(before)) if settings.span_labels else 0,
        start_action=start.action,
        start_from=start.source,
        start_step=start.step,
    )
