"""HTTP routes of the queue (claim, renew, skip, submit, progress), the bench page, and the
admins' view of a round's queue."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Request, Response, status
from fastapi.responses import HTMLResponse
from sqlalchemy.orm import Session

from ..deps import AdminDep, AnnotatorDep, SessionDep, in_queue_thread
from ..json_answers import json_answer
from ..limits import RowId
from ..loops.deps import LoopDep, LoopSlug, RoundDep
from ..loops.service import get_loop
from ..loops.spec import spec_of
from ..models import utcnow
from ..templating import templates
from . import service
from .answers import stored_action
from .bench import bench_item
from .metrics import CLAIM_SECONDS
from .schemas import (
    ClaimRead,
    LabelCreate,
    LabelRead,
    LeaseRead,
    SkipRead,
)

router = APIRouter(tags=["queue"])

QUEUE = "/api/loops/{slug}/queue"


# The annotators' routes are async and run their store work, the loop's lookup included, in one trip
# to the queue's own turns of the thread pool (`in_queue_thread`, which closes the session in that
# trip too). The caller's role is checked first, on the event loop, so a caller without it gets
# 401/403 before an unknown loop's 404. An unknown loop is a 404 whatever else the request holds
# (tests/api/test_path_lookups.py), but FastAPI validates an item id or a body before the route
# runs: routes with either take the slug through `KnownLoopDep`, which settles in a dependency that
# the loop exists. Loops are never deleted, so each process remembers the slugs it found and asks
# the store only about a slug it has not seen.


async def _known_loop(request: Request, slug: LoopSlug, session: SessionDep) -> str:
    """The path's slug, once its loop is known to exist (NotFound otherwise)."""
    known: set[str] = request.app.state.known_loops
    if slug not in known:
        await in_queue_thread(request, session, get_loop, slug=slug)
        known.add(slug)
    return slug


KnownLoopDep = Annotated[str, Depends(_known_loop)]


@router.post(QUEUE + "/claim", response_model=ClaimRead)
async def claim(
    request: Request, slug: LoopSlug, session: SessionDep, caller: AnnotatorDep
) -> Response:
    """Lease the next state to label, or get back the one already held (annotator)."""
    return await in_queue_thread(request, session, _claim, slug=slug, user_id=caller.user_id)


def _claim(session: Session, *, slug: str, user_id: int) -> Response:
    loop = get_loop(session, slug=slug)
    with CLAIM_SECONDS.time():
        claimed = service.claim_next(session, loop=loop, user_id=user_id, now=utcnow())
    item = None
    if claimed is not None:
        item = bench_item(session, loop=loop, claim=claimed, user_id=user_id)
    return json_answer(ClaimRead(item=item))


@router.post(QUEUE + "/items/{item_id}/renew", response_model=LeaseRead)
async def renew(
    request: Request,
    item_id: RowId,
    session: SessionDep,
    caller: AnnotatorDep,
    slug: KnownLoopDep,
) -> LeaseRead:
    """Extend the lease on a held item while its annotator works (annotator)."""
    return await in_queue_thread(
        request, session, _renew, slug=slug, item_id=item_id, user_id=caller.user_id
    )


def _renew(session: Session, *, slug: str, item_id: int, user_id: int) -> LeaseRead:
    loop = get_loop(session, slug=slug)
    expires_at = service.renew(session, loop=loop, item_id=item_id, user_id=user_id, now=utcnow())
    return LeaseRead(item_id=item_id, lease_expires_at=expires_at)


@router.post(QUEUE + "/items/{item_id}/skip", response_model=SkipRead)
async def skip(
    request: Request,
    item_id: RowId,
    session: SessionDep,
    caller: AnnotatorDep,
    slug: KnownLoopDep,
) -> SkipRead:
    """Pass on an item; it is not offered to this annotator again (annotator)."""
    return await in_queue_thread(
        request, session, _skip, slug=slug, item_id=item_id, user_id=caller.user_id
    )


def _skip(session: Session, *, slug: str, item_id: int, user_id: int) -> SkipRead:
    loop = get_loop(session, slug=slug)
    service.skip(session, loop=loop, item_id=item_id, user_id=user_id, now=utcnow())
    return SkipRead(item_id=item_id, skipped=True)


@router.post(
    QUEUE + "/items/{item_id}/labels",
    response_model=LabelRead,
    status_code=status.HTTP_201_CREATED,
    responses={200: {"description": "a repeated submission: the label stored the first time"}},
)
async def submit(
    request: Request,
    item_id: RowId,
    body: LabelCreate,
    session: SessionDep,
    caller: AnnotatorDep,
    slug: KnownLoopDep,
) -> Response:
    """Submit an answer (an action, or unsure) for a held item; repeats are harmless (annotator)."""
    return await in_queue_thread(
        request, session, _submit, slug=slug, item_id=item_id, body=body, user_id=caller.user_id
    )


def _submit(
    session: Session, *, slug: str, item_id: int, body: LabelCreate, user_id: int
) -> Response:
    loop = get_loop(session, slug=slug)
    done = service.submit(
        session,
        loop=loop,
        item_id=item_id,
        user_id=user_id,
        submission_id=body.submission_id,
        answer=body.answer,
        action=body.action,
        span_steps=body.span_steps,
        seconds_spent=body.seconds_spent,
        now=utcnow(),
    )
    label = done.label
    action = stored_action(label)
    answer = LabelRead(
        id=label.id,
        item_id=item_id,
        step_id=label.step_id,
        answer=label.answer,
        action=action,
        action_name=spec_of(loop).action_name(action),
        learner_shown=label.learner_shown,
        span_labels=done.span_labels,
        seconds_spent=label.seconds_spent,
        created_at=label.created_at,
        repeated=done.repeated,
    )
    return json_answer(answer, status_code=200 if done.repeated else 201)


@router.get(QUEUE + "/progress", response_model=service.Progress)
async def progress(
    request: Request, slug: LoopSlug, session: SessionDep, caller: AnnotatorDep
) -> service.Progress:
    """Labelled today, left in the queue, and expected time left at today's pace (annotator)."""
    return await in_queue_thread(request, session, _progress, slug=slug, user_id=caller.user_id)


def _progress(session: Session, *, slug: str, user_id: int) -> service.Progress:
    loop = get_loop(session, slug=slug)
    return service.progress(session, loop=loop, user_id=user_id, now=utcnow())


@router.get("/api/loops/{slug}/rounds/{number}/queue", response_model=service.RoundQueue)
def round_queue(session: SessionDep, _: AdminDep, rnd: RoundDep) -> service.RoundQueue:
    """Counts of a round's queue: items, labels, live leases, skips (admin)."""
    return service.round_queue(session, rnd=rnd, now=utcnow())


@router.get("/loops/{slug}/bench", response_class=HTMLResponse)
def bench_page(request: Request, caller: AnnotatorDep, loop: LoopDep) -> Response:
    """The bench: label the loop's queued states, keyboard first (annotator)."""
    spec = spec_of(loop)
    settings = spec.settings
    names = spec.feature_names
    key = [names.index(n) for n in settings.key_features or []]
    order = key + [i for i in range(len(names)) if i not in key]
    commands = ["action"] if spec.is_discrete else list(spec.action_names)
    config = {
        "slug": loop.slug,
        "features": loop.features,
        "action_space": loop.action_space,
        "lease_seconds": settings.lease_seconds,
        "context_seconds": settings.context_seconds,
        "span_labels": settings.span_labels,
        # key features first; the first two are plotted, with the first command where shown
        "feature_order": order,
        "key_count": len(key),
        "plotted": order[:2],
        "command_names": commands,
        "plotted_commands": [0] if settings.context_commands != "none" else [],
        "context_commands": settings.context_commands,
        "continuous_start": settings.continuous_start,
    }
    return templates.TemplateResponse(
        request,
        "bench.html",
        # "subject", not "loop": Jinja's for-loops own the name `loop`
        {"caller": caller, "subject": loop, "settings": settings, "config": config},
    )
