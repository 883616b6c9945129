"""Submitting a label: checked first (app.queue.answers), idempotent on the client's submission
id, and optionally copied to the steps just before (span labels)."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from functools import cache
from typing import Any

from sqlalchemy import (
    Delete,
    Select,
    Table,
    Update,
    and_,
    bindparam,
    case,
    delete,
    func,
    insert,
    or_,
    select,
    update,
)
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, make_transient_to_detached
from sqlalchemy.sql.dml import ReturningInsert

from ..db import write_transaction
from ..errors import Conflict, InvalidInput
from ..ingest.models import Step
from ..loops.models import Loop
from ..loops.spec import spec_of
from ..shared.current import is_current
from .answers import check_answer, check_request
from .models import ITEM_DONE, ITEM_OPEN, Label, Lease
from .models import QueueItem as Item
from .rules import lock_item


@dataclass(frozen=True)
class Submitted:
    """The stored label, how many span labels came with it, and whether it was a repeat."""

    label: Label
    span_labels: int
    repeated: bool


def submit(
    session: Session,
    *,
    loop: Loop,
    item_id: int,
    user_id: int,
    submission_id: str,
    answer: str,
    action: Any,
    span_steps: int = 0,
    seconds_spent: float | None = None,
    now: datetime,
) -> Submitted:
    """Store an annotator's answer on an item they hold a live lease on.

    A repeat with the same submission id returns the stored label (nothing new is written); the
    id reused on another item is a Conflict, as is a submit without a live lease. The item is
    done when `labels_done` reaches `labels_needed`. With `span_steps`, the same action is also
    stored for that many steps just before (within the context window), flagged as span labels.
    """
    spec = spec_of(loop)
    settings = spec.settings
    check_request(
        settings,
        submission_id=submission_id,
        answer=answer,
        span_steps=span_steps,
        seconds_spent=seconds_spent,
    )
    index, vector = check_answer(spec, answer=answer, action=action)
    try:
        with write_transaction(session):
            item = lock_item(session, loop=loop, item_id=item_id)
            params = {
                "submission_id": submission_id,
                "item_id": item.id,
                "step_id": item.step_id,
                "user_id": user_id,
                "now": now,
            }
            earlier_answers = list(session.scalars(_answers_query(), params))
            for stored in earlier_answers:
                if stored.submission_id == submission_id:
                    return _repeat(session, stored, item_id=item_id, user_id=user_id)
            if earlier_answers:
                raise Conflict(f"you already labelled item {item_id}")
            if item.status != ITEM_OPEN:
                raise Conflict(f"item {item_id} already has all its labels")
            # the lease is returned here; finding none live refuses the submit (and rolls back).
            # Statements without ORM objects run on the connection (see app/queue/rules.py).
            connection = session.connection()
            if connection.execute(_return_lease(), params).rowcount == 0:
                raise Conflict(
                    f"you hold no live claim on item {item_id} (it lapsed or was never taken); "
                    "claim the next item"
                )
            earlier = _preceding_steps(
                session, step_id=item.step_id, count=span_steps, seconds=settings.context_seconds
            )
            stored = connection.execute(
                _insert_label(),
                {
                    "item_id": item.id,
                    "step_id": item.step_id,
                    "round_id": item.round_id,
                    "user_id": user_id,
                    "submission_id": submission_id,
                    "answer": answer,
                    "action": index,
                    "action_vec": vector,
                    "learner_shown": item.show_learner,
                    "span": False,
                    "span_anchor_id": None,
                    "seconds_spent": seconds_spent,
                    "created_at": now,
                    "supersedes_id": None,
                },
            ).one()
            # the row as stored, put in the session as if loaded from it (nothing to write), so
            # the caller gets the session's own object for it, as from an ORM INSERT
            label = Label(**stored._mapping)
            make_transient_to_detached(label)
            session.add(label)
            if earlier:
                session.execute(
                    insert(Label),
                    [
                        {
                            "item_id": None,
                            "step_id": step_id,
                            "round_id": round_id,
                            "user_id": user_id,
                            "submission_id": f"{submission_id}.{k}",
                            "answer": answer,
                            "action": index,
                            "action_vec": vector,
                            "learner_shown": False,
                            "span": True,
                            "span_anchor_id": label.id,
                            "created_at": now,
                        }
                        for k, (step_id, round_id) in enumerate(earlier, start=1)
                    ],
                )
            done = item.labels_done + 1 >= item.labels_needed
            # only :item_id: an UPDATE reads other keys named like columns as values to SET
            connection.execute(_count_label(), {"item_id": item.id})
            if done and item.labels_needed > 1:  # lapsed leases of others may be left
                session.execute(delete(Lease).where(Lease.item_id == item.id))
            return Submitted(label=label, span_labels=len(earlier), repeated=False)
    except IntegrityError:
        # a concurrent submit with the same id won the race; the unique column decided it
        winner = _by_submission(session, submission_id)
        if winner is None:
            raise
        return _repeat(session, winner, item_id=item_id, user_id=user_id)


# Statements of the submit path, built once (see app/queue/rules.py for why).
@cache
def _answers_query() -> Select[Any]:
    """Labels with :submission_id, or of :user_id on item :item_id (one query)."""
    return (
        select(Label)
        .where(
            or_(
                Label.submission_id == bindparam("submission_id"),
                and_(
                    Label.step_id == bindparam("step_id"),
                    Label.item_id == bindparam("item_id"),
                    Label.user_id == bindparam("user_id"),
                    is_current(),
                ),
            )
        )
        .execution_options(populate_existing=True)
    )


@cache
def _insert_label() -> ReturningInsert[Any]:
    """One label, every column given, returning the stored row: on the connection, as an
    ORM INSERT ... RETURNING of the entity cost three times as much."""
    labels: Table = Label.__table__  # type: ignore[assignment]
    return insert(labels).returning(*labels.c)


@cache
def _return_lease() -> Delete:
    return delete(Lease).where(
        Lease.item_id == bindparam("item_id"),
        Lease.user_id == bindparam("user_id"),
        Lease.expires_at > bindparam("now"),
    )


@cache
def _count_label() -> Update:
    """One more label on item :item_id; done when it reaches labels_needed."""
    return (
        update(Item)
        .where(Item.id == bindparam("item_id"))
        .values(
            labels_done=Item.labels_done + 1,
            status=case((Item.labels_done + 1 >= Item.labels_needed, ITEM_DONE), else_=ITEM_OPEN),
        )
        .execution_options(synchronize_session=False)
    )


def _by_submission(session: Session, submission_id: str) -> Label | None:
    return session.scalar(
        select(Label)
        .where(Label.submission_id == submission_id)
        .execution_options(populate_existing=True)
    )


def _repeat(session: Session, stored: Label, *, item_id: int, user_id: int) -> Submitted:
    if stored.item_id != item_id or stored.user_id != user_id or stored.span:
        raise Conflict(
            f"submission id '{stored.submission_id}' was already used for another answer; "
            "send a new id with each answer"
        )
    spans = session.scalar(
        select(func.count()).select_from(Label).where(Label.span_anchor_id == stored.id)
    )
    return Submitted(label=stored, span_labels=int(spans or 0), repeated=True)


def _preceding_steps(
    session: Session, *, step_id: int, count: int, seconds: float
) -> list[tuple[int, int]]:
    """(step id, round id) of the `count` steps just before a state, nearest first."""
    if count == 0:
        return []
    anchor = session.execute(
        select(Step.rollout_id, Step.step_index, Step.time_s).where(Step.id == step_id)
    ).one()
    # the same window the bench's context view shows (reads.state_with_context)
    rows = session.execute(
        select(Step.id, Step.round_id)
        .where(
            Step.rollout_id == anchor.rollout_id,
            Step.step_index < anchor.step_index,
            Step.time_s >= anchor.time_s - seconds,
        )
        .order_by(Step.step_index.desc())
        .limit(count)
    ).all()
    if len(rows) < count:
        raise InvalidInput(
            f"span_steps: only {len(rows)} steps precede this state within its "
            f"{seconds:g} s context; ask for at most that many"
        )
    return [(int(r.id), int(r.round_id)) for r in rows]
