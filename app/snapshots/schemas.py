"""API shapes of snapshots (immutable training-set versions)."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, Field

from ..limits import INT32_MAX, RequestBody, UtcDatetime
from .models import Snapshot

ExportFormat = Literal["parquet", "npz", "jsonl"]


class SnapshotCreate(RequestBody):
    up_to_round: int | None = Field(
        default=None,
        ge=0,
        le=INT32_MAX,
        description="Last round whose rows the version holds; default: the loop's newest round.",
    )


class SnapshotRead(BaseModel):
    version: str
    up_to_round: int
    row_count: int
    content_sha256: str
    created_at: UtcDatetime
    created_by: str | None

    @classmethod
    def of(cls, snapshot: Snapshot) -> SnapshotRead:
        return cls(**_fields(snapshot))


class SnapshotDetail(SnapshotRead):
    manifest: dict[str, Any]

    @classmethod
    def of(cls, snapshot: Snapshot) -> SnapshotDetail:
        return cls(**_fields(snapshot), manifest=snapshot.manifest)


class SnapshotCreated(SnapshotDetail):
    created: bool = Field(description="False when an identical version existed and is returned.")

    @classmethod
    def made(cls, snapshot: Snapshot, *, created: bool) -> SnapshotCreated:
        return cls(**_fields(snapshot), manifest=snapshot.manifest, created=created)


class SnapshotList(BaseModel):
    items: list[SnapshotRead]
    total: int


def _fields(snapshot: Snapshot) -> dict[str, Any]:
    return {
        "version": f"v{snapshot.version}",
        "up_to_round": snapshot.up_to_round,
        "row_count": snapshot.row_count,
        "content_sha256": snapshot.content_sha256,
        "created_at": snapshot.created_at,
        "created_by": snapshot.manifest.get("created_by"),
    }
