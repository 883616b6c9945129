"""HTTP routes of an annotator's recent labels: list them, undo one, change one."""

from __future__ import annotations

from fastapi import APIRouter, Response, status
from sqlalchemy.orm import Session

from ..deps import AnnotatorDep, SessionDep
from ..loops.deps import LoopDep
from ..loops.models import Loop
from ..loops.spec import spec_of
from ..models import utcnow
from ..queue.answers import stored_action
from ..queue.bench import bench_step
from ..queue.models import Label
from . import service
from .schemas import (
    ChangeCreate,
    ChangeRead,
    MyLabel,
    MyLabelList,
    UndoCreate,
    UndoRead,
)

router = APIRouter(tags=["queue"])

MINE = "/api/loops/{slug}/queue/my-labels"


def _read(session: Session, loop: Loop, labels: list[Label]) -> list[MyLabel]:
    states = service.states_of(session, loop=loop, labels=labels)
    held = service.first_versions(session, loop=loop, labels=labels)
    spec = spec_of(loop)
    out = []
    for label in labels:
        action = stored_action(label)
        version = held.get(label.id)
        out.append(
            MyLabel(
                id=label.id,
                item_id=label.item_id or 0,
                state=bench_step(states[label.step_id]),
                answer=label.answer,
                action=action,
                action_name=spec.action_name(action),
                created_at=label.created_at,
                replaces=label.supersedes_id,
                in_snapshot=None if version is None else f"v{version}",
                can_undo=version is None,
            )
        )
    return out


@router.get(MINE, response_model=MyLabelList)
def my_labels(session: SessionDep, caller: AnnotatorDep, loop: LoopDep) -> MyLabelList:
    """Your last 20 standing answers on this loop, newest first, with their states (annotator)."""
    labels = service.recent(session, loop=loop, user_id=caller.user_id)
    items = _read(session, loop, labels)
    return MyLabelList(items=items, total=len(items))


@router.post(MINE + "/{label_id}/undo", response_model=UndoRead)
def undo(
    label_id: int, body: UndoCreate, session: SessionDep, caller: AnnotatorDep, loop: LoopDep
) -> UndoRead:
    """Take back your answer while no snapshot holds it; the state returns to the queue
    (annotator)."""
    done = service.undo(
        session,
        loop=loop,
        label_id=label_id,
        user_id=caller.user_id,
        submission_id=body.submission_id,
        now=utcnow(),
    )
    return UndoRead(label_id=label_id, item_id=done.replaced.item_id or 0, repeated=done.repeated)


@router.post(
    MINE + "/{label_id}/change",
    response_model=ChangeRead,
    status_code=status.HTTP_201_CREATED,
    responses={200: {"description": "a repeated request: the answer stored the first time"}},
)
def change(
    label_id: int,
    body: ChangeCreate,
    response: Response,
    session: SessionDep,
    caller: AnnotatorDep,
    loop: LoopDep,
) -> ChangeRead:
    """Replace your answer on a state; once a snapshot holds the old one, the new one is a
    correction used from the next snapshot on (annotator)."""
    done = service.change(
        session,
        loop=loop,
        label_id=label_id,
        user_id=caller.user_id,
        submission_id=body.submission_id,
        answer=body.answer,
        action=body.action,
        now=utcnow(),
    )
    if done.repeated:
        response.status_code = status.HTTP_200_OK
    held = service.first_versions(session, loop=loop, labels=[done.replaced, done.label])
    (label,) = _read(session, loop, [done.label])
    return ChangeRead(label=label, correction=done.replaced.id in held, repeated=done.repeated)
