"""The sampler's output: one selection per round, and the states it chose with their reasons."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Float,
    ForeignKey,
    Integer,
    LargeBinary,
    String,
    UniqueConstraint,
)
from sqlalchemy.orm import Mapped, mapped_column

from ..models import Base, UTCDateTime, utcnow

REASON_RANKED = "ranked"
REASON_AUDIT = "audit"


class Selection(Base):
    """A round's ranking: its parameters, and every candidate's scores as packed arrays."""

    __tablename__ = "selections"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    round_id: Mapped[int] = mapped_column(ForeignKey("rounds.id", ondelete="CASCADE"), unique=True)
    job_id: Mapped[int | None] = mapped_column(ForeignKey("jobs.id", ondelete="SET NULL"))
    budget: Mapped[int] = mapped_column(Integer)
    seed: Mapped[int] = mapped_column(BigInteger)
    params: Mapped[dict[str, Any]] = mapped_column(JSON)
    uncertainty_method: Mapped[str | None] = mapped_column(String(32), nullable=True)
    n_candidates: Mapped[int] = mapped_column(Integer)
    n_training: Mapped[int] = mapped_column(Integer)
    # .npz bytes: step_id, uncertainty, novelty, percentiles, boost, score for every candidate
    candidate_scores: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    created_by: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)


class SelectedState(Base):
    """A chosen state, with its scores and the reason it was chosen (ranked or audit)."""

    __tablename__ = "selected_states"
    __table_args__ = (UniqueConstraint("selection_id", "step_id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    selection_id: Mapped[int] = mapped_column(
        ForeignKey("selections.id", ondelete="CASCADE"), index=True
    )
    step_id: Mapped[int] = mapped_column(ForeignKey("steps.id", ondelete="CASCADE"))
    rank: Mapped[int] = mapped_column(Integer)
    reason: Mapped[str] = mapped_column(String(16))
    uncertainty: Mapped[float | None] = mapped_column(Float, nullable=True)
    novelty: Mapped[float] = mapped_column(Float)
    uncertainty_pct: Mapped[float | None] = mapped_column(Float, nullable=True)
    novelty_pct: Mapped[float] = mapped_column(Float)
    boost: Mapped[float] = mapped_column(Float, default=0.0)
    score: Mapped[float] = mapped_column(Float)
