"""Immutable training-set versions.

A snapshot's rows are a pure function of (loop, up_to_round, max_step_id, max_label_id): steps and
labels are never changed or deleted, so the same content can be rebuilt and re-exported byte for
byte at any time; the content hash proves it.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import JSON, BigInteger, ForeignKey, Integer, String, UniqueConstraint
from sqlalchemy.orm import Mapped, mapped_column

from ..models import Base, UTCDateTime, utcnow


class Snapshot(Base):
    """Version N of a loop's training set up to a round."""

    __tablename__ = "snapshots"
    __table_args__ = (UniqueConstraint("loop_id", "version"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    loop_id: Mapped[int] = mapped_column(ForeignKey("loops.id", ondelete="CASCADE"))
    version: Mapped[int] = mapped_column(Integer)
    up_to_round: Mapped[int] = mapped_column(Integer)
    max_step_id: Mapped[int] = mapped_column(BigInteger)
    max_label_id: Mapped[int] = mapped_column(BigInteger)
    row_count: Mapped[int] = mapped_column(Integer)
    content_sha256: Mapped[str] = mapped_column(String(64), index=True)
    manifest: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    created_by: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)
