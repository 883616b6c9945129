"""HTTP routes for snapshots: create a version, list and read them, stream an export (trainer)."""

from __future__ import annotations

from fastapi import APIRouter, Query, Response, status
from fastapi.responses import StreamingResponse

from ..deps import SessionDep, SettingsDep, TrainerDep, WriterSessionDep
from ..loops.deps import LoopDep, WriterLoopDep
from . import service
from .export import MEDIA_TYPES
from .schemas import (
    ExportFormat,
    SnapshotCreate,
    SnapshotCreated,
    SnapshotDetail,
    SnapshotList,
    SnapshotRead,
)

router = APIRouter(prefix="/api/loops", tags=["snapshots"])


@router.post(
    "/{slug}/snapshots",
    response_model=SnapshotCreated,
    status_code=status.HTTP_201_CREATED,
    responses={200: {"model": SnapshotCreated, "description": "An identical version existed."}},
)
def create_snapshot(
    body: SnapshotCreate,
    response: Response,
    session: WriterSessionDep,
    reader: SessionDep,
    settings: SettingsDep,
    caller: TrainerDep,
    loop: WriterLoopDep,
) -> SnapshotCreated:
    """Make the next immutable version up to a round; 200 with the existing one if identical.

    The version's Parquet export is written to its file before the answer, so that the first
    pull is served from the file too.
    """
    snapshot, created = service.create_snapshot(
        session,
        loop=loop,
        up_to_round=body.up_to_round,
        user_id=caller.user_id,
        reader=reader,
        files_dir=settings.snapshot_dir,
    )
    if not created:
        response.status_code = status.HTTP_200_OK
    return SnapshotCreated.made(snapshot, created=created)


@router.get("/{slug}/snapshots", response_model=SnapshotList)
def list_snapshots(session: SessionDep, _: TrainerDep, loop: LoopDep) -> SnapshotList:
    """A loop's snapshots, newest first."""
    items = [SnapshotRead.of(s) for s in service.list_snapshots(session, loop=loop)]
    return SnapshotList(items=items, total=len(items))


@router.get("/{slug}/snapshots/{version}", response_model=SnapshotDetail)
def read_snapshot(
    version: str, session: SessionDep, _: TrainerDep, loop: LoopDep
) -> SnapshotDetail:
    """One snapshot ("vN" or "latest") with its manifest."""
    return SnapshotDetail.of(service.get_snapshot(session, loop=loop, version=version))


@router.get("/{slug}/snapshots/{version}/export")
def export_snapshot(
    version: str,
    session: SessionDep,
    settings: SettingsDep,
    _: TrainerDep,
    loop: LoopDep,
    format: ExportFormat = Query("parquet", description="parquet, npz or jsonl"),
    since: str | None = Query(
        None, description="An earlier version (vN): only rows not identical in it."
    ),
) -> StreamingResponse:
    """Stream a snapshot's rows as Parquet, .npz or JSON Lines."""
    snapshot, older = service.resolve_export(session, loop=loop, version=version, since=since)
    exported = service.export_chunks(
        session,
        loop=loop,
        snapshot=snapshot,
        since=older,
        file_format=format,
        spool_dir=settings.data_dir / "exports",
        files_dir=settings.snapshot_dir,
    )
    filename = service.export_filename(loop, snapshot, older, format)
    headers = {
        "Content-Disposition": f'attachment; filename="{filename}"',
        "X-Expertloop-Version": f"v{snapshot.version}",
        "X-Expertloop-Content-Sha256": snapshot.content_sha256,
    }
    if older is None:
        headers["X-Expertloop-Rows"] = str(snapshot.row_count)
    if exported.size is not None:
        headers["Content-Length"] = str(exported.size)
    return StreamingResponse(exported.chunks, media_type=MEDIA_TYPES[format], headers=headers)
