"""API shapes of ranking requests and selections."""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, Field

from ..jobs.schemas import JobRead
from ..limits import RequestBody, UtcDatetime


class RankingRequest(RequestBody):
    budget: int = Field(ge=1, le=1_000_000, description="Labels to ask for in this round.")
    seed: int | None = Field(
        default=None, ge=0, lt=2**63, description="Seed of the audit sample; random if omitted."
    )


class RankingStarted(BaseModel):
    job: JobRead


class SelectedStateRead(BaseModel):
    step_id: int
    rollout: str
    step: int
    time_s: float
    reason: str
    rank: int
    uncertainty: float | None
    novelty: float
    uncertainty_pct: float | None
    novelty_pct: float
    boost: float
    score: float


class SelectionRead(BaseModel):
    round: int
    budget: int
    seed: int
    uncertainty_method: str | None
    n_candidates: int
    n_training: int
    params: dict[str, Any]
    created_at: UtcDatetime
    items: list[SelectedStateRead]
    total: int
    offset: int
    limit: int
