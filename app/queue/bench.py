"""What the bench shows for a claimed item, built from the ingest reads."""

from __future__ import annotations

from sqlalchemy.orm import Session

from app.ingest import reads
from app.ingest.schemas import StepRead
from app.loops.models import Loop
from app.queue.schemas import BenchItem, BenchStep
from app.queue.service import Claim, loop_settings


def bench_step(step: StepRead) -> BenchStep:
    """A step as the bench shows it (no learner outputs)."""
    # the values were validated as a StepRead a moment ago; no need to check them again
    return BenchStep.model_construct(
        id=step.id,
        rollout=step.rollout,
        step=step.step,
        time_s=step.time_s,
        control=step.control,
        features=step.features,
        scene=step.scene,
        image_sha256=step.image_sha256,
    )


def bench_item(session: Session, *, loop: Loop, claim: Claim) -> BenchItem:
    """The claimed state with the preceding `context_seconds` of its rollout.

    Only steps before the state are sent: later steps would show what the learner did next.
    """
    settings = loop_settings(loop)
    state, before, _after = reads.state_with_context(
        session, loop=loop, step_id=claim.item.step_id, seconds=settings.context_seconds
    )
    shown = claim.item.show_learner
    return BenchItem(
        item_id=claim.item.id,
        lease_expires_at=claim.expires_at,
        lease_seconds=settings.lease_seconds,
        state=bench_step(state),
        context=[bench_step(s) for s in before],
        context_seconds=settings.context_seconds,
        learner_shown=shown,
        learner_action=state.learner_action if shown else None,
        span_max_steps=min(settings.span_max_steps, len(before)) if settings.span_labels else 0,
    )
