"""HTTP routes for loops and rounds."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Body, status
from sqlalchemy.orm import Session

from ..deps import AdminDep, ReaderDep, SessionDep, WriterSessionDep
from ..limits import RoundNumber
from . import service
from .deps import LoopDep, WriterLoopDep
from .log_mapping import LogMapping
from .models import Loop
from .schemas import LoopCreate, LoopList, LoopRead, RoundList, RoundOpen, RoundRead

router = APIRouter(prefix="/api/loops", tags=["loops"])


@router.post("", response_model=LoopRead, status_code=status.HTTP_201_CREATED)
def create_loop(spec: LoopCreate, session: WriterSessionDep, caller: AdminDep) -> LoopRead:
    """Create a loop from its spec (admin)."""
    loop = service.create_loop(session, spec=spec, user_id=caller.user_id)
    return LoopRead.model_validate(loop)


@router.get("", response_model=LoopList)
def list_loops(session: SessionDep, _: ReaderDep) -> LoopList:
    """All loops."""
    loops = service.list_loops(session)
    return LoopList(items=[LoopRead.model_validate(x) for x in loops], total=len(loops))


@router.get("/{slug}", response_model=LoopRead)
def read_loop(_: ReaderDep, loop: LoopDep) -> LoopRead:
    """One loop's spec and settings."""
    return LoopRead.model_validate(loop)


@router.put("/{slug}/log-mapping", response_model=LoopRead)
def set_log_mapping(
    log_mapping: Annotated[LogMapping, Body(embed=True)],
    session: WriterSessionDep,
    _: AdminDep,
    loop: WriterLoopDep,
) -> LoopRead:
    """Set or replace the loop's log mapping (admin), checked as in a new loop's spec: robot
    logs uploaded from now on are read through it."""
    return LoopRead.model_validate(service.set_log_mapping(session, loop=loop, mapping=log_mapping))


@router.get("/{slug}/rounds", response_model=RoundList)
def list_rounds(session: SessionDep, _: ReaderDep, loop: LoopDep) -> RoundList:
    """Rounds of a loop with rollout and step counts."""
    items = service.round_summaries(session, loop=loop)
    return RoundList(items=items, total=len(items))


@router.post("/{slug}/rounds", response_model=RoundRead, status_code=status.HTTP_201_CREATED)
def open_round(
    body: RoundOpen, session: WriterSessionDep, caller: AdminDep, loop: WriterLoopDep
) -> RoundRead:
    """Open the next round for rollouts of a learner version (admin)."""
    new = service.open_round(
        session, loop=loop, learner_version=body.learner_version, user_id=caller.user_id
    )
    return _summary(session, loop=loop, number=new.number)


@router.post("/{slug}/rounds/{number}/close", response_model=RoundRead)
def close_round(
    number: RoundNumber, session: WriterSessionDep, _: AdminDep, loop: WriterLoopDep
) -> RoundRead:
    """Close a round: it takes no more uploads (admin)."""
    service.close_round(session, loop=loop, number=number)
    return _summary(session, loop=loop, number=number)


def _summary(session: Session, *, loop: Loop, number: int) -> RoundRead:
    return next(r for r in service.round_summaries(session, loop=loop) if r.number == number)
