"""HTTP routes for rollout upload and reading rollouts, steps and states."""

from __future__ import annotations

from collections.abc import AsyncIterator
from pathlib import Path

from fastapi import APIRouter, Query, Request, UploadFile, status
from fastapi.responses import FileResponse, Response
from starlette.concurrency import run_in_threadpool

from ..deps import AnnotatorDep, ReaderDep, SessionDep, SettingsDep, UploaderDep
from ..errors import InvalidInput, NotFound
from ..limits import PageOffset, StepId
from ..loops.deps import LoopDep, RoundDep
from ..loops.spec import spec_of
from . import image_store, reads, service
from .images import HEAD_BYTES, IMAGE_TYPES, image_media_type
from .limits import UploadLimits
from .schemas import RolloutList, StateContext, StepList, UploadRead
from .spool import CHUNK_BYTES, spool

router = APIRouter(prefix="/api", tags=["rollouts"])

PAGE_MAX = 1000


async def _chunks(upload: UploadFile) -> AsyncIterator[bytes]:
    while chunk := await upload.read(CHUNK_BYTES):
        yield chunk


@router.post(
    "/loops/{slug}/rounds/{number}/rollouts",
    response_model=UploadRead,
    status_code=status.HTTP_201_CREATED,
)
async def upload_rollouts(
    request: Request,
    file: UploadFile,
    session: SessionDep,
    settings: SettingsDep,
    caller: UploaderDep,
    loop: LoopDep,
    rnd: RoundDep,
) -> UploadRead:
    """Upload one rollout file (Parquet, .npz or JSON Lines) or robot log (ROS bag) into a
    round (uploader)."""
    # the form is parsed already (FastAPI took `file` from it); a second file would be dropped
    files = len((await request.form()).getlist("file"))
    if files > 1:
        raise InvalidInput(f"send one file per upload; this request has {files} parts named 'file'")
    # Store work runs in worker threads: the event loop must stay free for other requests.
    await run_in_threadpool(service.check_upload_target, session, loop=loop, rnd=rnd)
    path, sha = await spool(_chunks(file), settings.upload_dir, settings.max_upload_bytes)
    try:
        outcome = await run_in_threadpool(
            service.ingest_file,
            session,
            loop=loop,
            rnd=rnd,
            path=path,
            filename=file.filename or "upload",
            file_sha256=sha,
            user_id=caller.user_id,
            blob_dir=settings.blob_dir,
            limits=UploadLimits(
                max_image_bytes=settings.max_image_bytes,
                max_scene_bytes=settings.max_scene_bytes,
                max_array_bytes=settings.max_array_bytes,
            ),
            max_unpacked_bytes=settings.max_unpacked_bytes,
        )
    finally:
        path.unlink(missing_ok=True)
    return UploadRead(
        upload_id=outcome.upload_id,
        duplicate_file=outcome.duplicate_file,
        steps=outcome.n_steps,
        rollouts=outcome.rollouts,
        already_stored=outcome.already_stored,
    )


@router.get("/loops/{slug}/rounds/{number}/rollouts", response_model=RolloutList)
def list_rollouts(
    session: SessionDep,
    _: ReaderDep,
    rnd: RoundDep,
    offset: PageOffset = 0,
    limit: int = Query(100, ge=1, le=PAGE_MAX),
) -> RolloutList:
    """A page of a round's rollouts."""
    items, total = reads.list_rollouts(session, rnd=rnd, offset=offset, limit=limit)
    return RolloutList(items=items, total=total, offset=offset, limit=limit)


@router.get("/loops/{slug}/rollouts/{key}/steps", response_model=StepList)
def list_steps(
    key: str,
    session: SessionDep,
    _: ReaderDep,
    loop: LoopDep,
    offset: PageOffset = 0,
    limit: int = Query(200, ge=1, le=PAGE_MAX),
) -> StepList:
    """A page of one rollout's steps."""
    rollout = reads.get_rollout(session, loop=loop, key=key)
    items = reads.list_steps(session, loop=loop, rollout=rollout, offset=offset, limit=limit)
    return StepList(items=items, total=rollout.n_steps, offset=offset, limit=limit)


@router.get("/loops/{slug}/states/{step_id}", response_model=StateContext)
def read_state(
    step_id: StepId,
    session: SessionDep,
    _: ReaderDep,
    loop: LoopDep,
    seconds: float | None = Query(None, gt=0, le=120, allow_inf_nan=False),
) -> StateContext:
    """One state with its rollout's steps around it in time (the bench's context)."""
    window = seconds if seconds is not None else spec_of(loop).settings.context_seconds
    state, before, after = reads.state_with_context(
        session, loop=loop, step_id=step_id, seconds=window
    )
    return StateContext(state=state, before=before, after=after, context_seconds=window)


@router.get(
    "/images/{sha256}",
    response_class=Response,
    responses={
        200: {
            "description": "The image with its own type; a blob stored before images were "
            "checked comes as an application/octet-stream download.",
            "content": {
                kind: {"schema": {"type": "string", "format": "binary"}}
                for kind in (*IMAGE_TYPES, "application/octet-stream")
            },
        }
    },
)
def read_image(
    sha256: str, session: SessionDep, settings: SettingsDep, _: AnnotatorDep
) -> Response:
    """A camera image attached to a state, by its content hash (annotator)."""
    if len(sha256) != 64 or any(c not in "0123456789abcdef" for c in sha256):
        raise NotFound("no such image")
    found = image_store.read_image(session, sha256=sha256, blob_dir=settings.blob_dir)
    if found is None:
        raise NotFound("no such image")
    if isinstance(found, Path):  # a single file, stored before packs
        with found.open("rb") as fh:
            head = fh.read(HEAD_BYTES)
    else:
        head = found[:HEAD_BYTES]
    media_type = image_media_type(head)
    # A blob stored before images were checked may be anything: offer it only as a download.
    headers = {} if media_type else {"Content-Disposition": "attachment"}
    kind = media_type or "application/octet-stream"
    if isinstance(found, Path):
        return FileResponse(found, media_type=kind, headers=headers)
    return Response(found, media_type=kind, headers=headers)
