"""An annotator's recent labels, and taking one back or changing it.

Labels are never changed: an undo or a change is a new label row that supersedes the old one
(`app.queue.current`), so a snapshot pinned below the new row's id keeps the old answer. Undo is
offered while no snapshot holds the answer; after that the annotator changes it instead, and the
change is a correction that the next version uses. Every write locks the queue item first, as
claims and submissions do, so an undo and another annotator's submit on the same item serialise.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import case, insert, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from ..db import write_transaction
from ..errors import Conflict, NotFound
from ..ingest import reads
from ..loops.models import Loop, Round
from ..loops.spec import spec_of
from ..queue.answers import check_answer, check_request
from ..queue.models import ANSWER_UNDONE, ITEM_DONE, ITEM_OPEN, Label
from ..queue.models import QueueItem as Item
from ..queue.rules import lock_item, rounds_of
from ..shared.current import is_current
from ..snapshots.models import Snapshot

RECENT = 20


@dataclass(frozen=True)
class Revised:
    """The row an undo or change stored, and whether it repeated an earlier request."""

    label: Label
    replaced: Label
    repeated: bool


def recent(session: Session, *, loop: Loop, user_id: int, limit: int = RECENT) -> list[Label]:
    """The caller's standing answers on queued states of the loop, newest first."""
    return list(
        session.scalars(
            select(Label)
            .where(
                Label.user_id == user_id,
                Label.round_id.in_(rounds_of(loop.id)),
                Label.span.is_(False),
                Label.item_id.is_not(None),
                is_current(),
            )
            .order_by(Label.id.desc())
            .limit(limit)
        )
    )


def first_versions(session: Session, *, loop: Loop, labels: list[Label]) -> dict[int, int]:
    """Label id -> the first snapshot version holding it, for the labels some version holds.

    A version holds a label when its round is within the version's rounds and its id within the
    version's label cut-off.
    """
    if not labels:
        return {}
    versions = session.execute(
        select(Snapshot.version, Snapshot.up_to_round, Snapshot.max_label_id)
        .where(Snapshot.loop_id == loop.id)
        .order_by(Snapshot.version)
    ).all()
    if not versions:
        return {}
    numbers = dict(
        session.execute(
            select(Round.id, Round.number).where(Round.id.in_({lab.round_id for lab in labels}))
        ).all()
    )
    held = {}
    for label in labels:
        for version, up_to_round, max_label_id in versions:
            if numbers[label.round_id] <= up_to_round and label.id <= max_label_id:
                held[label.id] = int(version)
                break
    return held


def states_of(session: Session, *, loop: Loop, labels: list[Label]) -> dict[int, Any]:
    """Step id -> the step each label answers (StepRead)."""
    return reads.steps_by_id(session, loop=loop, step_ids=sorted({lab.step_id for lab in labels}))


def undo(
    session: Session,
    *,
    loop: Loop,
    label_id: int,
    user_id: int,
    submission_id: str,
    now: datetime,
) -> Revised:
    """Take back the caller's answer while no snapshot holds it; the item returns to the queue.

    A repeat with the same submission id returns the stored undo. Conflict when a version holds
    the answer already (change it instead), or when it was undone or changed meanwhile.
    """
    check_request(
        spec_of(loop).settings,
        submission_id=submission_id,
        answer="unsure",
        span_steps=0,
        seconds_spent=None,
    )
    try:
        with write_transaction(session):
            found = _standing_label(
                session, loop=loop, label_id=label_id, user_id=user_id, submission_id=submission_id
            )
            if isinstance(found, Revised):
                return found
            label, item = found
            held = first_versions(session, loop=loop, labels=[label]).get(label.id)
            if held is not None:
                raise Conflict(
                    f"version v{held} already holds this answer, so it cannot be undone; "
                    "change it instead: the new answer replaces it from the next version on"
                )
            undone = _insert(
                session,
                label,
                submission_id=submission_id,
                answer=ANSWER_UNDONE,
                index=None,
                vector=None,
                now=now,
            )
            # one answer fewer: the item is open again, for this annotator too
            session.execute(
                update(Item)
                .where(Item.id == item.id)
                .values(
                    labels_done=Item.labels_done - 1,
                    status=case(
                        (Item.labels_done - 1 >= Item.labels_needed, ITEM_DONE), else_=ITEM_OPEN
                    ),
                )
                .execution_options(synchronize_session=False)
            )
            return Revised(label=undone, replaced=label, repeated=False)
    except IntegrityError:
        return _after_race(session, submission_id, label_id=label_id, user_id=user_id)


def change(
    session: Session,
    *,
    loop: Loop,
    label_id: int,
    user_id: int,
    submission_id: str,
    answer: str,
    action: Any,
    now: datetime,
) -> Revised:
    """Store a new answer superseding the caller's earlier one on the same state.

    Before any version holds the old answer this is a plain change; afterwards it is a
    correction, used by the next version and counted by the round's queue counts. A repeat with
    the same submission id returns the stored answer.
    """
    check_request(
        spec_of(loop).settings,
        submission_id=submission_id,
        answer=answer,
        span_steps=0,
        seconds_spent=None,
    )
    index, vector = check_answer(spec_of(loop), answer=answer, action=action)
    try:
        with write_transaction(session):
            found = _standing_label(
                session, loop=loop, label_id=label_id, user_id=user_id, submission_id=submission_id
            )
            if isinstance(found, Revised):
                return found
            label, _item = found
            new = _insert(
                session,
                label,
                submission_id=submission_id,
                answer=answer,
                index=index,
                vector=vector,
                now=now,
            )
            return Revised(label=new, replaced=label, repeated=False)
    except IntegrityError:
        return _after_race(session, submission_id, label_id=label_id, user_id=user_id)


def _standing_label(
    session: Session, *, loop: Loop, label_id: int, user_id: int, submission_id: str
) -> Revised | tuple[Label, Item]:
    """The stored revision when this request repeats one; else the caller's label, checked to
    be still standing once its queue item is locked, and the item."""
    repeat = _repeat(session, submission_id, label_id=label_id, user_id=user_id)
    if repeat is not None:
        return repeat
    label = _own_label(session, loop=loop, label_id=label_id, user_id=user_id)
    item = lock_item(session, loop=loop, item_id=label.item_id or 0)
    _standing(session, label)
    return label, item


def _own_label(session: Session, *, loop: Loop, label_id: int, user_id: int) -> Label:
    label = session.scalar(
        select(Label)
        .where(Label.id == label_id, Label.round_id.in_(rounds_of(loop.id)))
        .execution_options(populate_existing=True)
    )
    if label is None or label.user_id != user_id or label.span or label.item_id is None:
        # other annotators' labels are not theirs to see: the same answer as a missing one
        raise NotFound(f"you have no label {label_id} on a queued state of loop '{loop.slug}'")
    return label


def _standing(session: Session, label: Label) -> None:
    """Conflict unless the label is still the caller's standing answer (read under the lock)."""
    standing = session.scalar(select(Label.id).where(Label.id == label.id, is_current()))
    if standing is None:
        raise Conflict(f"label {label.id} was already undone or changed; reload your recent labels")


def _insert(
    session: Session,
    label: Label,
    *,
    submission_id: str,
    answer: str,
    index: int | None,
    vector: bytes | None,
    now: datetime,
) -> Label:
    return session.scalars(
        insert(Label).returning(Label),
        [
            {
                "item_id": label.item_id,
                "step_id": label.step_id,
                "round_id": label.round_id,
                "user_id": label.user_id,
                "submission_id": submission_id,
                "answer": answer,
                "action": index,
                "action_vec": vector,
                "learner_shown": label.learner_shown,
                "span": False,
                "created_at": now,
                "supersedes_id": label.id,
            }
        ],
    ).one()


def _repeat(session: Session, submission_id: str, *, label_id: int, user_id: int) -> Revised | None:
    stored = session.scalar(
        select(Label)
        .where(Label.submission_id == submission_id)
        .execution_options(populate_existing=True)
    )
    if stored is None:
        return None
    if stored.supersedes_id != label_id or stored.user_id != user_id:
        raise Conflict(
            f"submission id '{submission_id}' was already used for another answer; "
            "send a new id with each request"
        )
    replaced = session.get(Label, label_id)
    assert replaced is not None
    return Revised(label=stored, replaced=replaced, repeated=True)


def _after_race(session: Session, submission_id: str, *, label_id: int, user_id: int) -> Revised:
    # the unique submission id or the one-successor rule decided a concurrent request
    repeat = _repeat(session, submission_id, label_id=label_id, user_id=user_id)
    if repeat is None:
        raise Conflict(f"label {label_id} was undone or changed at the same moment; reload")
    return repeat
