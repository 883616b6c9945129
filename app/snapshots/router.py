"""HTTP routes for snapshots: create a version, list and read them, stream an export (trainer)."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Annotated

from anyio import CancelScope, to_thread
from fastapi import APIRouter, Path, Query, Response, status
from fastapi.responses import StreamingResponse
from starlette.types import Receive, Scope, Send

from ..deps import SessionDep, SessionFactoryDep, SettingsDep, TrainerDep, WriterSessionDep
from ..loops.deps import LoopDep, WriterLoopDep
from ..shared.allocator import release_free_memory
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

# The versions service.get_snapshot takes. It refuses any other with a message of its own, so
# the pattern is stated in the schema only, not checked by FastAPI before it.
VERSION_SCHEMA = {"pattern": r"^(latest|v[1-9][0-9]{0,8})$"}
Version = Annotated[str, Path(description='"vN" or "latest".', json_schema_extra=VERSION_SCHEMA)]


class _ClosingStream(StreamingResponse):
    """A streamed answer whose pieces are closed once it ends, sent in full or not.

    Starlette drops a body a client walked away from without closing it; a rebuilt export
    then kept its session, its threads' last work and its partial file until the garbage
    collector got round to it. Closing runs in the thread pool (it waits for the work in hand
    to end) and is shielded from the cancellation that a disconnect brings.
    """

    def __init__(self, chunks: Iterator[bytes], media_type: str, headers: dict[str, str]):
        super().__init__(chunks, media_type=media_type, headers=headers)
        self._chunks = chunks

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        try:
            await super().__call__(scope, receive, send)
        finally:
            with CancelScope(shield=True):
                await to_thread.run_sync(self._close)

    def _close(self) -> None:
        close = getattr(self._chunks, "close", None)
        if close is not None:
            close()
        # the export's buffers are free now: give their pages back (app.shared.allocator)
        release_free_memory()


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
    release_free_memory()  # the pass over the rows is done (app.shared.allocator)
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
    version: Version, session: SessionDep, _: TrainerDep, loop: LoopDep
) -> SnapshotDetail:
    """One snapshot ("vN" or "latest") with its manifest."""
    return SnapshotDetail.of(service.get_snapshot(session, loop=loop, version=version))


@router.get(
    "/{slug}/snapshots/{version}/export",
    response_class=Response,
    responses={
        200: {
            "description": "The rows in the asked format: Parquet, .npz or JSON Lines.",
            "content": {
                kind: {"schema": {"type": "string", "format": "binary"}}
                for kind in MEDIA_TYPES.values()
            },
        }
    },
)
def export_snapshot(
    version: Version,
    session: SessionDep,
    sessions: SessionFactoryDep,
    settings: SettingsDep,
    _: TrainerDep,
    loop: LoopDep,
    format: ExportFormat = Query("parquet", description="parquet, npz or jsonl"),
    since: str | None = Query(
        None,
        description="An earlier version (vN or latest): only rows not identical in it.",
        json_schema_extra=VERSION_SCHEMA,
    ),
) -> StreamingResponse:
    """Stream a snapshot's rows as Parquet, .npz or JSON Lines."""
    snapshot, older = service.resolve_export(session, loop=loop, version=version, since=since)
    exported = service.export_chunks(
        loop=loop,
        snapshot=snapshot,
        since=older,
        file_format=format,
        spool_dir=settings.data_dir / "exports",
        files_dir=settings.snapshot_dir,
        sessions=sessions,
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
    # the pieces come from the stored file or a session of their own: the request's session
    # would otherwise hold a connection (and on SQLite a read transaction) for the whole stream
    session.close()
    return _ClosingStream(exported.chunks, media_type=MEDIA_TYPES[format], headers=headers)
