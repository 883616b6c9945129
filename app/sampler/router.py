"""HTTP routes: start a ranking job for a round, read the round's selection."""

from __future__ import annotations

from fastapi import APIRouter, Query, status

from ..deps import AdminDep, ReaderDep, SessionDep, WriterSessionDep
from ..jobs.schemas import JobRead
from ..limits import PageOffset
from ..loops.deps import RoundDep, WriterLoopDep, WriterRoundDep
from . import service
from .schemas import RankingRequest, RankingStarted, SelectedStateRead, SelectionRead

router = APIRouter(prefix="/api/loops/{slug}/rounds/{number}", tags=["sampler"])


@router.post("/ranking", response_model=RankingStarted, status_code=status.HTTP_202_ACCEPTED)
def start_ranking(
    body: RankingRequest,
    session: WriterSessionDep,
    caller: AdminDep,
    loop: WriterLoopDep,
    rnd: WriterRoundDep,
) -> RankingStarted:
    """Rank the round's states in the background and fill its queue (admin); follow the job."""
    job = service.request_ranking(
        session, loop=loop, rnd=rnd, budget=body.budget, seed=body.seed, user_id=caller.user_id
    )
    return RankingStarted(job=JobRead.model_validate(job))


@router.get("/selection", response_model=SelectionRead)
def read_selection(
    session: SessionDep,
    _: ReaderDep,
    rnd: RoundDep,
    offset: PageOffset = 0,
    limit: int = Query(200, ge=1, le=1000),
) -> SelectionRead:
    """The chosen states with their scores and the reason each was chosen (ranked or audit)."""
    selection = service.get_selection(session, rnd=rnd)
    items, total = service.selected_states(session, selection=selection, offset=offset, limit=limit)
    return SelectionRead(
        round=rnd.number,
        budget=selection.budget,
        seed=selection.seed,
        uncertainty_method=selection.uncertainty_method,
        n_candidates=selection.n_candidates,
        n_training=selection.n_training,
        params=selection.params,
        created_at=selection.created_at,
        items=[SelectedStateRead(**i) for i in items],
        total=total,
        offset=offset,
        limit=limit,
    )
