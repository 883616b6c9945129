"""Tables written by ingest: uploads, rollouts and their steps (the visited states)."""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import (
    BigInteger,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    SmallInteger,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import Mapped, mapped_column

from ..models import Base, UTCDateTime, utcnow

CONTROL_LEARNER = 0
CONTROL_EXPERT = 1


class Upload(Base):
    """One accepted rollout file; its hash makes a repeated upload a no-op."""

    __tablename__ = "uploads"
    __table_args__ = (UniqueConstraint("round_id", "file_sha256"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    round_id: Mapped[int] = mapped_column(ForeignKey("rounds.id", ondelete="CASCADE"), index=True)
    file_sha256: Mapped[str] = mapped_column(String(64))
    filename: Mapped[str] = mapped_column(String(300))
    file_format: Mapped[str] = mapped_column(String(16))
    n_rollouts: Mapped[int] = mapped_column(Integer)
    n_steps: Mapped[int] = mapped_column(Integer)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    uploaded_by: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)


class Rollout(Base):
    """One run of the robot, identified by its key within a loop."""

    __tablename__ = "rollouts"
    __table_args__ = (UniqueConstraint("loop_id", "key"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    loop_id: Mapped[int] = mapped_column(ForeignKey("loops.id", ondelete="CASCADE"))
    round_id: Mapped[int] = mapped_column(ForeignKey("rounds.id", ondelete="CASCADE"), index=True)
    upload_id: Mapped[int] = mapped_column(ForeignKey("uploads.id", ondelete="CASCADE"))
    key: Mapped[str] = mapped_column(String(200))
    robot: Mapped[str | None] = mapped_column(String(200), nullable=True)
    n_steps: Mapped[int] = mapped_column(Integer)
    # hash of the rollout's canonical content: a key reused with other content is refused
    content_sha256: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    uploaded_by: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)


class Step(Base):
    """One visited state. Vectors are little-endian float32 bytes, decoded in bulk."""

    __tablename__ = "steps"
    __table_args__ = (
        UniqueConstraint("rollout_id", "step_index"),
        Index("ix_steps_round_id_id", "round_id", "id"),
    )

    id: Mapped[int] = mapped_column(BigInteger().with_variant(Integer, "sqlite"), primary_key=True)
    rollout_id: Mapped[int] = mapped_column(ForeignKey("rollouts.id", ondelete="CASCADE"))
    round_id: Mapped[int] = mapped_column(ForeignKey("rounds.id", ondelete="CASCADE"))
    step_index: Mapped[int] = mapped_column(Integer)
    time_s: Mapped[float] = mapped_column(Float)
    control: Mapped[int] = mapped_column(SmallInteger)  # CONTROL_LEARNER | CONTROL_EXPERT
    features: Mapped[bytes] = mapped_column(LargeBinary)
    # discrete actions are indexes; continuous actions are float32 vectors
    learner_action: Mapped[int | None] = mapped_column(Integer, nullable=True)
    learner_action_vec: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    expert_action: Mapped[int | None] = mapped_column(Integer, nullable=True)
    expert_action_vec: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    learner_probs: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    learner_ensemble: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    ensemble_size: Mapped[int | None] = mapped_column(SmallInteger, nullable=True)
    learner_std: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    scene: Mapped[str | None] = mapped_column(Text, nullable=True)
    image_sha256: Mapped[str | None] = mapped_column(String(64), nullable=True)


class StoredImage(Base):
    """Where a camera image's bytes are: a range of one pack file under the blob folder.

    Keyed by the image's SHA-256, so an image is stored once whatever uploads carry it; rows are
    written in the transaction of the upload that wrote the pack (app/ingest/image_store.py).
    Images stored before packs existed are single files and have no row here.
    """

    __tablename__ = "images"

    sha256: Mapped[str] = mapped_column(String(64), primary_key=True)
    pack: Mapped[str] = mapped_column(String(32))
    byte_offset: Mapped[int] = mapped_column(BigInteger)
    byte_length: Mapped[int] = mapped_column(Integer)
