"""API shape of a job."""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict

from ..limits import UtcDatetime


class JobRead(BaseModel):
    model_config = ConfigDict(from_attributes=True)

    id: int
    kind: str
    params: dict[str, Any]
    status: str
    progress: float
    message: str | None
    result: dict[str, Any] | None
    attempts: int
    created_at: UtcDatetime
    started_at: UtcDatetime | None
    finished_at: UtcDatetime | None
