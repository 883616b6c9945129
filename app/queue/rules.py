"""Who may hold which queue item: the statements shared by claims, renewals, skips and labels.

The statements on the claim and submit paths are built once with bound parameters (:loop_id,
:user_id, :now, :item_id) and reused: building one costs about as much as running it. Those that
read or write no ORM objects run on the session's connection (`session.connection()`, the same
transaction): through the ORM a DELETE of no rows took 0.14 ms here, on the connection 0.02 ms.
None touches a table whose changes the sign-in cache watches (app/auth/changes.py sees ORM
statements only).
"""

from __future__ import annotations

from datetime import datetime
from functools import cache
from typing import Any

from sqlalchemy import (
    ColumnElement,
    DateTime,
    Delete,
    Integer,
    Select,
    Table,
    bindparam,
    delete,
    func,
    insert,
    or_,
    select,
)
from sqlalchemy.orm import Session
from sqlalchemy.sql.dml import ReturningInsert

from ..db import is_postgresql
from ..errors import NotFound
from ..loops.models import Loop, Round
from ..shared.current import is_current
from .models import ITEM_OPEN, Label, Lease, QueueItem, Skip


def rounds_of(loop_id: Any = None) -> Select[Any]:
    """Ids of a loop's rounds, as a subquery for IN (so row locks stay on queue_items alone).

    Without an argument the loop id is the bound parameter :loop_id.
    """
    return select(Round.id).where(
        Round.loop_id == (bindparam("loop_id") if loop_id is None else loop_id)
    )


def open_rounds() -> Select[Any]:
    """Ids of loop :loop_id's rounds that still have an open item (an index probe each): where
    claims look, and where the items left for an annotator are."""
    has_open = (
        select(QueueItem.id)
        .where(QueueItem.round_id == Round.id, QueueItem.status == ITEM_OPEN)
        .correlate(Round)
        .exists()
    )
    return select(Round.id).where(Round.loop_id == bindparam("loop_id", type_=Integer), has_open)


def answered_by() -> ColumnElement[bool]:
    """EXISTS a label or a skip of user :user_id on the correlated QueueItem."""
    user = bindparam("user_id", type_=Integer)
    # step_id leads the label lookup to its index; item_id then pins the item
    labelled = (
        select(Label.id)
        .where(
            Label.step_id == QueueItem.step_id,
            Label.item_id == QueueItem.id,
            Label.user_id == user,
            is_current(),  # an undone answer leaves the item to be labelled again
        )
        .correlate(QueueItem)
        .exists()
    )
    skipped = (
        select(Skip.id)
        .where(Skip.item_id == QueueItem.id, Skip.user_id == user)
        .correlate(QueueItem)
        .exists()
    )
    return or_(labelled, skipped)


def room_for() -> list[ColumnElement[bool]]:
    """WHERE clauses on QueueItem: open, a label slot free of others' live leases at :now, and
    neither labelled nor skipped by :user_id."""
    live_by_others = (
        select(func.count())
        .select_from(Lease)
        .where(
            Lease.item_id == QueueItem.id,
            Lease.user_id != bindparam("user_id"),
            Lease.expires_at > bindparam("now"),
        )
        .correlate(QueueItem)
        .scalar_subquery()
    )
    return [
        QueueItem.status == ITEM_OPEN,
        QueueItem.labels_done + live_by_others < QueueItem.labels_needed,
        ~answered_by(),
    ]


@cache
def candidate_query(postgres: bool) -> Select[Any]:
    """The first item of round :round_id in queue order with room for :user_id at :now; on
    PostgreSQL locked, skipping rows other claims hold.

    One round at a time: with `round_id = :round_id ORDER BY position` the scan walks the index
    in queue order and stops at the first fit; over several rounds at once it read every open
    item before sorting.
    """
    query = (
        select(QueueItem)
        .where(QueueItem.round_id == bindparam("round_id"), *room_for())
        .order_by(QueueItem.position)
        .limit(1)
        .execution_options(populate_existing=True)
    )
    return query.with_for_update(skip_locked=True, of=QueueItem) if postgres else query


@cache
def live_leases_query() -> Select[int, int, str, int]:
    """The live leases of :user_id at :now, oldest first, with their items' status and round.

    Driven by the leases' user index: an annotator holds one or two leases, a queue thousands
    of items.
    """
    return (
        select(Lease.id, Lease.item_id, QueueItem.status, QueueItem.round_id)
        .join(QueueItem, QueueItem.id == Lease.item_id)
        .where(Lease.user_id == bindparam("user_id"), Lease.expires_at > bindparam("now"))
        .order_by(Lease.claimed_at, Lease.id)
    )


@cache
def _lease_if_room() -> ReturningInsert[int]:
    """Lease item :item_id to :user_id until :expires_at, only if it has room for them at :now."""
    room = select(QueueItem.id).where(QueueItem.id == bindparam("item_id"), *room_for()).exists()
    source = select(
        bindparam("item_id", type_=Integer),
        bindparam("user_id", type_=Integer),
        bindparam("expires_at", type_=DateTime(timezone=True)),
        bindparam("now", type_=DateTime(timezone=True)),
    ).where(room)
    # the Core table: an ORM-enabled INSERT would read the bound parameters as row values
    leases: Table = Lease.__table__  # type: ignore[assignment]
    columns = [leases.c.item_id, leases.c.user_id, leases.c.expires_at, leases.c.claimed_at]
    return insert(leases).from_select(columns, source).returning(leases.c.id)


@cache
def _clear_leases() -> Delete:
    """Delete the leases on item :item_id that are :user_id's or lapsed at :now."""
    return delete(Lease).where(
        Lease.item_id == bindparam("item_id"),
        or_(Lease.user_id == bindparam("user_id"), Lease.expires_at <= bindparam("now")),
    )


def take_lease(
    session: Session, *, item_id: int, user_id: int, now: datetime, expires_at: datetime
) -> bool:
    """Lease the item to the user if it has room for them now; False if it has none.

    Lapsed leases on the item (theirs or others') are cleared first. The room is judged in the
    INSERT itself, a statement of its own: on PostgreSQL a row just unlocked by a claim that
    committed meanwhile was judged on an older snapshot by the query that found it.
    """
    params = {"item_id": item_id, "user_id": user_id, "expires_at": expires_at, "now": now}
    connection = session.connection()
    connection.execute(_clear_leases(), params)
    # RETURNING, not rowcount: drivers need not count the rows of INSERT ... SELECT
    return connection.execute(_lease_if_room(), params).first() is not None


@cache
def _item_query(lock: bool) -> Select[Any]:
    query = (
        select(QueueItem)
        .where(QueueItem.id == bindparam("item_id"), QueueItem.round_id.in_(rounds_of()))
        .execution_options(populate_existing=True)
    )
    return query.with_for_update(of=QueueItem) if lock else query


def lock_item(session: Session, *, loop: Loop, item_id: int, lock: bool = True) -> QueueItem:
    """The loop's queue item read fresh; with `lock`, locked for the transaction on PostgreSQL."""
    query = _item_query(lock and is_postgresql(session))
    item = session.scalars(query, {"item_id": item_id, "loop_id": loop.id}).first()
    if item is None:
        raise NotFound(f"loop '{loop.slug}' has no queue item {item_id}")
    return item
