"""The relabelling queue: enqueue a round's selected states, claim them with leases, renew, skip.

Submitting labels lives in `app.queue.labels`, progress in `app.queue.progress`; both are
re-exported here so other domains import one module (`from ..queue import service`).

Claim rules, for an annotator on a loop: the item is open, `labels_done` plus the live leases of
other annotators is below `labels_needed`, and the annotator has neither labelled nor skipped it.
An annotator holding a live lease gets that item back (resuming). Every write runs in
`write_transaction`: rows locked with FOR UPDATE (SKIP LOCKED for claims) on PostgreSQL, BEGIN
IMMEDIATE on SQLite.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta
from functools import cache
from typing import Any

import numpy as np
from sqlalchemy import Select, Update, bindparam, delete, func, insert, or_, select, update
from sqlalchemy.orm import Session

from ..auth.models import User
from ..db import is_postgresql, write_transaction
from ..errors import Conflict, InvalidInput
from ..ingest.models import Step
from ..loops.models import Loop, Round
from ..loops.spec import spec_of
from ..sampler.models import SelectedState, Selection
from ..shared.current import is_current
from .labels import Submitted, submit
from .models import ITEM_OPEN, Label, Lease, QueueItem, Skip
from .progress import Progress, RoundQueue, progress, round_queue
from .rules import (
    candidate_query,
    live_leases_query,
    lock_item,
    open_rounds,
    take_lease,
)

__all__ = [
    "Claim",
    "Progress",
    "RoundQueue",
    "Submitted",
    "claim_next",
    "enqueue_selection",
    "enqueue_in_order",
    "progress",
    "renew",
    "round_queue",
    "skip",
    "submit",
]


@dataclass(frozen=True)
class Claim:
    """An item held by an annotator until `expires_at` (unless renewed)."""

    item: QueueItem
    expires_at: datetime


# --- enqueue -------------------------------------------------------------------------------


def enqueue_selection(session: Session, *, rnd: Round, selection: Selection, loop: Loop) -> int:
    """Queue a selection's states in rank order; returns how many items were added.

    Audit states keep the places the selection gave them, and nothing on an item tells its
    reason. Whether the bench shows the learner's action is drawn once per item from a generator
    seeded with the selection's seed. Does not commit: the caller commits with the selection.
    """
    if selection.round_id != rnd.id or rnd.loop_id != loop.id:
        raise InvalidInput(f"selection {selection.id} does not belong to round {rnd.number}")
    rows = session.execute(
        select(SelectedState.id, SelectedState.step_id)
        .where(SelectedState.selection_id == selection.id)
        .order_by(SelectedState.rank, SelectedState.id)
    ).all()
    return enqueue_in_order(
        session,
        rnd=rnd,
        loop=loop,
        step_ids=[r.step_id for r in rows],
        selected_ids=[r.id for r in rows],
        rng=np.random.default_rng(selection.seed),
    )


def replace_round_queue(session: Session, loop: Loop, rnd: Round, selection: Selection) -> int:
    """The round's queue becomes the selection's states (the ranking job calls this in its
    transaction, after storing the selection); returns how many items were queued."""
    session.execute(delete(QueueItem).where(QueueItem.round_id == rnd.id))
    return enqueue_selection(session, rnd=rnd, selection=selection, loop=loop)


def enqueue_in_order(
    session: Session,
    *,
    rnd: Round,
    loop: Loop,
    step_ids: list[int],
    selected_ids: list[int | None],
    rng: np.random.Generator,
) -> int:
    settings = spec_of(loop).settings
    # One draw per state in queue order, so the shown/hidden split is reproducible from the seed.
    draws = rng.random(len(step_ids))
    with_learner = set(
        session.scalars(
            select(Step.id).where(
                Step.id.in_(step_ids),
                or_(Step.learner_action.is_not(None), Step.learner_action_vec.is_not(None)),
            )
        )
    )
    queued = set(
        session.scalars(
            select(QueueItem.step_id).where(
                QueueItem.round_id == rnd.id, QueueItem.step_id.in_(step_ids)
            )
        )
    )
    last = session.scalar(select(func.max(QueueItem.position)).where(QueueItem.round_id == rnd.id))
    position = -1 if last is None else int(last)
    rows = []
    for step_id, selected_id, draw in zip(step_ids, selected_ids, draws.tolist(), strict=True):
        if step_id in queued:
            continue
        queued.add(step_id)
        position += 1
        rows.append(
            {
                "round_id": rnd.id,
                "step_id": step_id,
                "selected_state_id": selected_id,
                "position": position,
                "labels_needed": settings.labels_per_state,
                "labels_done": 0,
                # nothing to show where the learner did not act
                "show_learner": bool(draw < settings.show_learner_fraction)
                and step_id in with_learner,
                "status": ITEM_OPEN,
            }
        )
    if rows:
        session.execute(insert(QueueItem), rows)
    session.flush()
    return len(rows)


# --- claim, renew, skip --------------------------------------------------------------------


def claim_next(session: Session, *, loop: Loop, user_id: int, now: datetime) -> Claim | None:
    """Lease the next item for an annotator (or renew the one they hold); None when none is left.

    Items are offered round by round (oldest first), in queue position within a round.
    PostgreSQL: the candidate row is locked with FOR UPDATE SKIP LOCKED, and the lease is taken
    only if the item still has room when judged again in the INSERT, because a row unlocked by a
    claim that committed meanwhile was judged on the older snapshot. SQLite: the whole claim runs
    under BEGIN IMMEDIATE.
    """
    expires_at = now + timedelta(seconds=spec_of(loop).settings.lease_seconds)
    postgres = is_postgresql(session)
    params: dict[str, Any] = {"user_id": user_id, "now": now}
    with write_transaction(session):
        # statements without ORM objects run on the connection (see app/queue/rules.py)
        connection = session.connection()
        if postgres:  # one claim at a time per annotator, so a double click takes one lease
            connection.execute(_lock_annotator(), params)
        round_ids = list(connection.scalars(_loop_rounds(), {"loop_id": loop.id}))
        for held in connection.execute(live_leases_query(), params).all():
            if held.status == ITEM_OPEN and held.round_id in round_ids:
                connection.execute(_extend_lease(), {"lease_id": held.id, "expires_at": expires_at})
                item = lock_item(session, loop=loop, item_id=held.item_id, lock=False)
                return Claim(item=item, expires_at=expires_at)
        for round_id in round_ids:
            passed: list[int] = []
            while True:
                query = candidate_query(postgres)
                if passed:
                    query = query.where(QueueItem.id.not_in(passed))
                candidate = session.scalars(query, {**params, "round_id": round_id}).first()
                if candidate is None:
                    break
                if take_lease(
                    session, item_id=candidate.id, user_id=user_id, now=now, expires_at=expires_at
                ):
                    return Claim(item=candidate, expires_at=expires_at)
                passed.append(candidate.id)  # judged on a stale snapshot (PostgreSQL): next one
        return None


# Statements of the claim path, built once (see app/queue/rules.py for why).
@cache
def _lock_annotator() -> Select[int]:
    return select(User.id).where(User.id == bindparam("user_id")).with_for_update(key_share=True)


@cache
def _loop_rounds() -> Select[int]:
    # only rounds with open items: a loop's finished rounds (the seed round, every round
    # labelled) would cost each claim a candidate query apiece
    return open_rounds().order_by(Round.number)


@cache
def _extend_lease() -> Update:
    # :lease_id, not :id: an UPDATE reads a key named like a column as a value to SET
    return (
        update(Lease)
        .where(Lease.id == bindparam("lease_id"))
        .values(expires_at=bindparam("expires_at"))
        .execution_options(synchronize_session=False)
    )


def renew(session: Session, *, loop: Loop, item_id: int, user_id: int, now: datetime) -> datetime:
    """Extend the user's lease on an item; a lapsed lease is taken again if the item has room."""
    expires_at = now + timedelta(seconds=spec_of(loop).settings.lease_seconds)
    with write_transaction(session):
        lock_item(session, loop=loop, item_id=item_id)
        renewed = session.execute(
            update(Lease)
            .where(Lease.item_id == item_id, Lease.user_id == user_id, Lease.expires_at > now)
            .values(expires_at=expires_at)
        )
        if renewed.rowcount == 0 and not take_lease(  # type: ignore[attr-defined]
            session, item_id=item_id, user_id=user_id, now=now, expires_at=expires_at
        ):
            raise Conflict(
                f"you hold no claim on item {item_id} (it lapsed or was never taken) and the "
                "item is no longer free for you; claim the next item"
            )
    return expires_at


def skip(session: Session, *, loop: Loop, item_id: int, user_id: int, now: datetime) -> None:
    """Pass on an item: the lease is returned and the item is not offered to the user again."""
    with write_transaction(session):
        item = lock_item(session, loop=loop, item_id=item_id)
        labelled = session.scalar(
            select(Label.id).where(
                Label.step_id == item.step_id,
                Label.item_id == item.id,
                Label.user_id == user_id,
                is_current(),
            )
        )
        if labelled is not None:
            raise Conflict(f"you already labelled item {item_id}; a label cannot be skipped")
        session.execute(delete(Lease).where(Lease.item_id == item_id, Lease.user_id == user_id))
        already = session.scalar(
            select(Skip.id).where(Skip.item_id == item_id, Skip.user_id == user_id)
        )
        if already is None:
            session.execute(insert(Skip).values(item_id=item_id, user_id=user_id, created_at=now))
