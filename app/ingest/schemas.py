"""API shapes of uploads, rollouts and steps."""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel

from ..limits import UtcDatetime


class UploadRead(BaseModel):
    upload_id: int
    duplicate_file: bool
    steps: int
    rollouts: list[dict[str, Any]]
    already_stored: list[str]


class RolloutRead(BaseModel):
    key: str
    round: int
    robot: str | None
    steps: int
    created_at: UtcDatetime


class RolloutList(BaseModel):
    items: list[RolloutRead]
    total: int
    offset: int
    limit: int


class StepRead(BaseModel):
    id: int
    rollout: str
    step: int
    time_s: float
    control: str
    features: list[float]
    learner_action: str | list[float] | None
    expert_action: str | list[float] | None
    learner_probs: list[float] | None
    learner_ensemble: list[list[float]] | None
    learner_std: list[float] | None
    scene: dict[str, Any] | None
    image_sha256: str | None


class StepList(BaseModel):
    items: list[StepRead]
    total: int
    offset: int
    limit: int


class StateContext(BaseModel):
    """One state with the steps of its rollout around it in time (what the bench shows)."""

    state: StepRead
    before: list[StepRead]
    after: list[StepRead]
    context_seconds: float
