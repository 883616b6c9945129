"""Tables for loops and their rounds."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import JSON, ForeignKey, Integer, String, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column

from ..models import Base, UTCDateTime, utcnow


class Loop(Base):
    """One DAgger process for one robot skill: its state schema, action space and settings."""

    __tablename__ = "loops"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    slug: Mapped[str] = mapped_column(String(64), unique=True)
    title: Mapped[str] = mapped_column(String(200))
    # [{"name": ..., "unit": ...}] in feature-vector order
    features: Mapped[list[dict[str, Any]]] = mapped_column(JSON)
    # {"kind": "discrete", "actions": [...]} or {"kind": "continuous", "dimensions": [...]}
    action_space: Mapped[dict[str, Any]] = mapped_column(JSON)
    settings: Mapped[dict[str, Any]] = mapped_column(JSON)
    # how states are read from robot logs (app/loops/log_mapping.py); none: files only
    log_mapping: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    created_by: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)


class Round(Base):
    """Round 0 holds seed demonstrations; round k holds rollouts of learner version k."""

    __tablename__ = "rounds"
    __table_args__ = (UniqueConstraint("loop_id", "number"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    loop_id: Mapped[int] = mapped_column(ForeignKey("loops.id", ondelete="CASCADE"), index=True)
    number: Mapped[int] = mapped_column(Integer)
    learner_version: Mapped[str | None] = mapped_column(String(200), nullable=True)
    status: Mapped[str] = mapped_column(String(16), default="open")  # open | closed
    opened_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    closed_at: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)
    opened_by: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)
