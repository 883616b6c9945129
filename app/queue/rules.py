"""Who may hold which queue item: the query pieces shared by claims, renewals, skips and labels."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import ColumnElement, Select, delete, func, insert, or_, select
from sqlalchemy.orm import Session

from app.errors import NotFound
from app.loops.models import Loop, Round
from app.loops.schemas import LoopSettings
from app.queue.locking import is_postgresql
from app.queue.models import ITEM_OPEN, Label, Lease, QueueItem, Skip


def loop_settings(loop: Loop) -> LoopSettings:
    """The loop's settings with defaults filled in."""
    return LoopSettings.model_validate(loop.settings)


def rounds_of(loop_id: int) -> Select[Any]:
    """Ids of a loop's rounds, as a subquery for IN (so row locks stay on queue_items alone)."""
    return select(Round.id).where(Round.loop_id == loop_id)


def answered_by(user_id: int) -> ColumnElement[bool]:
    """EXISTS a label or a skip of the user on the correlated QueueItem."""
    # step_id leads the label lookup to its index; item_id then pins the item
    labelled = (
        select(Label.id)
        .where(
            Label.step_id == QueueItem.step_id,
            Label.item_id == QueueItem.id,
            Label.user_id == user_id,
        )
        .correlate(QueueItem)
        .exists()
    )
    skipped = (
        select(Skip.id)
        .where(Skip.item_id == QueueItem.id, Skip.user_id == user_id)
        .correlate(QueueItem)
        .exists()
    )
    return or_(labelled, skipped)


def room_for(user_id: int, now: datetime) -> list[ColumnElement[bool]]:
    """WHERE clauses on QueueItem: open, a label slot free of others' live leases, and neither
    labelled nor skipped by the user."""
    live_by_others = (
        select(func.count())
        .select_from(Lease)
        .where(Lease.item_id == QueueItem.id, Lease.user_id != user_id, Lease.expires_at > now)
        .correlate(QueueItem)
        .scalar_subquery()
    )
    return [
        QueueItem.status == ITEM_OPEN,
        QueueItem.labels_done + live_by_others < QueueItem.labels_needed,
        ~answered_by(user_id),
    ]


def has_room(session: Session, *, item_id: int, user_id: int, now: datetime) -> bool:
    """Whether the user may take a lease on the item now (read in a statement of its own)."""
    found = session.scalar(
        select(QueueItem.id).where(QueueItem.id == item_id, *room_for(user_id, now))
    )
    return found is not None


def take_lease(
    session: Session, *, item_id: int, user_id: int, now: datetime, expires_at: datetime
) -> None:
    """Give the user a lease on the item, clearing lapsed leases on it (theirs or others')."""
    session.execute(
        delete(Lease).where(
            Lease.item_id == item_id, or_(Lease.user_id == user_id, Lease.expires_at <= now)
        )
    )
    session.execute(
        insert(Lease).values(
            item_id=item_id, user_id=user_id, expires_at=expires_at, claimed_at=now
        )
    )


def live_lease(session: Session, *, item_id: int, user_id: int, now: datetime) -> int | None:
    """Id of the user's unexpired lease on the item, if any."""
    return session.scalar(
        select(Lease.id).where(
            Lease.item_id == item_id, Lease.user_id == user_id, Lease.expires_at > now
        )
    )


def lock_item(session: Session, *, loop: Loop, item_id: int, lock: bool = True) -> QueueItem:
    """The loop's queue item read fresh; with `lock`, locked for the transaction on PostgreSQL."""
    query = (
        select(QueueItem)
        .where(QueueItem.id == item_id, QueueItem.round_id.in_(rounds_of(loop.id)))
        .execution_options(populate_existing=True)
    )
    if lock and is_postgresql(session):
        query = query.with_for_update(of=QueueItem)
    item = session.scalars(query).first()
    if item is None:
        raise NotFound(f"loop '{loop.slug}' has no queue item {item_id}")
    return item
