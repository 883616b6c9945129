"""The relabelling queue: items, leases held by annotators, skips, and the labels themselves."""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import (
    BigInteger,
    Boolean,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    String,
    UniqueConstraint,
)
from sqlalchemy.orm import Mapped, mapped_column

from ..models import Base, UTCDateTime, utcnow

ITEM_OPEN = "open"
ITEM_DONE = "done"
ANSWER_ACTION = "action"
ANSWER_UNSURE = "unsure"
# an annotator took their answer back; the row supersedes it and is never a vote
ANSWER_UNDONE = "undone"


class QueueItem(Base):
    """A state waiting for `labels_needed` labels from different annotators."""

    __tablename__ = "queue_items"
    __table_args__ = (
        UniqueConstraint("round_id", "step_id"),
        Index("ix_queue_items_round_id_status_position", "round_id", "status", "position"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    round_id: Mapped[int] = mapped_column(ForeignKey("rounds.id", ondelete="CASCADE"))
    step_id: Mapped[int] = mapped_column(ForeignKey("steps.id", ondelete="CASCADE"))
    selected_state_id: Mapped[int | None] = mapped_column(
        ForeignKey("selected_states.id", ondelete="SET NULL"), nullable=True
    )
    position: Mapped[int] = mapped_column(Integer)
    labels_needed: Mapped[int] = mapped_column(Integer)
    labels_done: Mapped[int] = mapped_column(Integer, default=0)
    # whether the bench shows the learner's action on this item (decided once, recorded)
    show_learner: Mapped[bool] = mapped_column(Boolean, default=False)
    status: Mapped[str] = mapped_column(String(8), default=ITEM_OPEN)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class Lease(Base):
    """An annotator's claim on an item; it lapses at expires_at unless renewed."""

    __tablename__ = "leases"
    __table_args__ = (UniqueConstraint("item_id", "user_id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    item_id: Mapped[int] = mapped_column(ForeignKey("queue_items.id", ondelete="CASCADE"))
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id", ondelete="CASCADE"), index=True)
    expires_at: Mapped[datetime] = mapped_column(UTCDateTime)
    claimed_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class Skip(Base):
    """An annotator passed on an item: it is not offered to them again."""

    __tablename__ = "skips"
    __table_args__ = (UniqueConstraint("item_id", "user_id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    item_id: Mapped[int] = mapped_column(ForeignKey("queue_items.id", ondelete="CASCADE"))
    # an annotator's skips (progress) without reading every open item
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id", ondelete="CASCADE"), index=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)


class Label(Base):
    """An expert's answer for one state: an action, or "unsure". Span labels have no item."""

    __tablename__ = "labels"
    __table_args__ = (
        Index("ix_labels_round_id_id", "round_id", "id"),
        # a state's labels, and one annotator's answer on it (the submit's repeat check): with
        # the user id in the key the planner never scans an annotator's every label instead
        Index("ix_labels_step_id_user_id", "step_id", "user_id"),
        # an annotator's labels of the day (progress, pace) without reading every label
        Index("ix_labels_user_id_created_at", "user_id", "created_at"),
        # an annotator's labels in the rounds that still have open items (progress)
        Index("ix_labels_user_id_round_id", "user_id", "round_id"),
        # a label is superseded at most once: by its annotator's correction, or their undo
        UniqueConstraint("supersedes_id"),
    )

    id: Mapped[int] = mapped_column(BigInteger().with_variant(Integer, "sqlite"), primary_key=True)
    item_id: Mapped[int | None] = mapped_column(
        ForeignKey("queue_items.id", ondelete="CASCADE"), nullable=True
    )
    step_id: Mapped[int] = mapped_column(ForeignKey("steps.id", ondelete="CASCADE"))
    round_id: Mapped[int] = mapped_column(ForeignKey("rounds.id", ondelete="CASCADE"))
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    # client-generated id: a repeated submit finds the label it already stored
    submission_id: Mapped[str] = mapped_column(String(64), unique=True)
    answer: Mapped[str] = mapped_column(String(8))  # action | unsure | undone
    action: Mapped[int | None] = mapped_column(Integer, nullable=True)
    action_vec: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    learner_shown: Mapped[bool] = mapped_column(Boolean, default=False)
    span: Mapped[bool] = mapped_column(Boolean, default=False)
    span_anchor_id: Mapped[int | None] = mapped_column(
        ForeignKey("labels.id", ondelete="CASCADE"), nullable=True
    )
    seconds_spent: Mapped[float | None] = mapped_column(Float, nullable=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    # labels are never changed: a change or an undo is a new row naming the label it replaces,
    # so a version pinned below the new row's id keeps the old answer
    supersedes_id: Mapped[int | None] = mapped_column(
        ForeignKey("labels.id", ondelete="CASCADE"), nullable=True
    )
