"""HTTP routes of the queue (claim, renew, skip, submit, progress), the bench page, and the
admins' view of a round's queue."""

from __future__ import annotations

from fastapi import APIRouter, Request, Response, status
from fastapi.responses import HTMLResponse

from ..deps import AdminDep, AnnotatorDep, SessionDep
from ..json_answers import json_answer
from ..limits import RowId
from ..loops.deps import LoopDep, RoundDep
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


@router.post(QUEUE + "/claim", response_model=ClaimRead)
def claim(session: SessionDep, caller: AnnotatorDep, loop: LoopDep) -> Response:
    """Lease the next state to label, or get back the one already held (annotator)."""
    with CLAIM_SECONDS.time():
        claimed = service.claim_next(session, loop=loop, user_id=caller.user_id, now=utcnow())
    if claimed is None:
        return json_answer(ClaimRead(item=None))
    item = bench_item(session, loop=loop, claim=claimed, user_id=caller.user_id)
    return json_answer(ClaimRead(item=item))


@router.post(QUEUE + "/items/{item_id}/renew", response_model=LeaseRead)
def renew(item_id: RowId, session: SessionDep, caller: AnnotatorDep, loop: LoopDep) -> LeaseRead:
    """Extend the lease on a held item while its annotator works (annotator)."""
    expires_at = service.renew(
        session, loop=loop, item_id=item_id, user_id=caller.user_id, now=utcnow()
    )
    return LeaseRead(item_id=item_id, lease_expires_at=expires_at)


@router.post(QUEUE + "/items/{item_id}/skip", response_model=SkipRead)
def skip(item_id: RowId, session: SessionDep, caller: AnnotatorDep, loop: LoopDep) -> SkipRead:
    """Pass on an item; it is not offered to this annotator again (annotator)."""
    service.skip(session, loop=loop, item_id=item_id, user_id=caller.user_id, now=utcnow())
    return SkipRead(item_id=item_id, skipped=True)


@router.post(
    QUEUE + "/items/{item_id}/labels",
    response_model=LabelRead,
    status_code=status.HTTP_201_CREATED,
    responses={200: {"description": "a repeated submission: the label stored the first time"}},
)
def submit(
    item_id: RowId,
    body: LabelCreate,
    session: SessionDep,
    caller: AnnotatorDep,
    loop: LoopDep,
) -> Response:
    """Submit an answer (an action, or unsure) for a held item; repeats are harmless (annotator)."""
    done = service.submit(
        session,
        loop=loop,
        item_id=item_id,
        user_id=caller.user_id,
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
def progress(session: SessionDep, caller: AnnotatorDep, loop: LoopDep) -> service.Progress:
    """Labelled today, left in the queue, and expected time left at today's pace (annotator)."""
    return service.progress(session, loop=loop, user_id=caller.user_id, now=utcnow())


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
