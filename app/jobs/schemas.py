"""API shape of a job."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from pydantic import BaseModel, ConfigDict


class JobRead(BaseModel):
    model_config = ConfigDict(from_attributes=True)

    id: int
    kind: str
    status: str
    progress: float
    message: str | None
    result: dict[str, Any] | None
    attempts: int
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None
