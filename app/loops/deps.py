"""Route dependencies for the loop and round a path names (`/loops/{slug}`, `/rounds/{number}`).

Each looks its row up in the route's own session, so the route, its services and the lookup
share one transaction: `LoopDep`/`RoundDep` in the read session (`SessionDep`), and
`WriterLoopDep`/`WriterRoundDep` in the writer session (`WriterSessionDep`) of a route that
declares that one. An unknown slug or round number is a 404 naming it.

Declare the caller's role (`Roles(...)`, e.g. `ReaderDep`) before these in a route's signature:
FastAPI resolves dependencies in that order, and a caller without the role must get 401/403,
never learn from a 404 which loops exist (tests/access/test_role_matrix.py asks for an unknown
loop).
"""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Path

from ..deps import SessionDep, WriterSessionDep
from ..limits import RoundNumber
from . import service
from .models import Loop, Round

LoopSlug = Annotated[str, Path(description="Loop slug.")]


def loop_of_path(slug: LoopSlug, session: SessionDep) -> Loop:
    """The loop the path names, read in the request's read session."""
    return service.get_loop(session, slug=slug)


def writer_loop_of_path(slug: LoopSlug, session: WriterSessionDep) -> Loop:
    """The loop the path names, read in the route's writer session."""
    return service.get_loop(session, slug=slug)


LoopDep = Annotated[Loop, Depends(loop_of_path)]
WriterLoopDep = Annotated[Loop, Depends(writer_loop_of_path)]


def round_of_path(number: RoundNumber, loop: LoopDep, session: SessionDep) -> Round:
    """Round `number` of the loop the path names, read in the request's read session."""
    return service.get_round(session, loop=loop, number=number)


def writer_round_of_path(
    number: RoundNumber, loop: WriterLoopDep, session: WriterSessionDep
) -> Round:
    """Round `number` of the loop the path names, read in the route's writer session."""
    return service.get_round(session, loop=loop, number=number)


RoundDep = Annotated[Round, Depends(round_of_path)]
WriterRoundDep = Annotated[Round, Depends(writer_round_of_path)]
