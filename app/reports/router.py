"""HTTP routes of the round report: JSON per round, the table across rounds, CSV, the loop page."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Request
from fastapi.responses import HTMLResponse, Response

from ..deps import ReaderDep, SessionDep
from ..limits import RoundNumber
from ..loops.deps import LoopDep
from ..templating import templates
from . import page, service, table
from .schemas import LoopReport, RoundReport

router = APIRouter(tags=["reports"])


def get_report_cache(request: Request) -> service.ReportCache:
    """The process's report cache, made on first use."""
    state = request.app.state
    if getattr(state, "report_cache", None) is None:
        state.report_cache = service.ReportCache()
    cache: service.ReportCache = state.report_cache
    return cache


CacheDep = Annotated[service.ReportCache, Depends(get_report_cache)]


@router.get("/api/loops/{slug}/rounds/{number}/report", response_model=RoundReport)
def round_report(
    number: RoundNumber, session: SessionDep, cache: CacheDep, _: ReaderDep, loop: LoopDep
) -> RoundReport:
    """One round's report: disagreement, shift, agreement, pace (any signed-in role)."""
    return service.round_report(session, loop=loop, number=number, cache=cache)


@router.get("/api/loops/{slug}/report", response_model=LoopReport)
def loop_report(session: SessionDep, cache: CacheDep, _: ReaderDep, loop: LoopDep) -> LoopReport:
    """The table across a loop's rounds (any signed-in role)."""
    return table.loop_table(loop, service.loop_reports(session, loop=loop, cache=cache))


@router.get(
    "/api/loops/{slug}/report.csv",
    response_class=Response,
    responses={200: {"content": {"text/csv": {"schema": {"type": "string"}}}}},
)
def loop_report_csv(session: SessionDep, cache: CacheDep, _: ReaderDep, loop: LoopDep) -> Response:
    """The table across rounds as CSV, one row per round (any signed-in role)."""
    rows = table.loop_table(loop, service.loop_reports(session, loop=loop, cache=cache)).items
    return Response(
        table.rows_csv(rows),
        media_type="text/csv; charset=utf-8",
        headers={"Content-Disposition": f'attachment; filename="{loop.slug}-report.csv"'},
    )


@router.get("/loops/{slug}", response_class=HTMLResponse)
def loop_page(
    request: Request, session: SessionDep, cache: CacheDep, caller: ReaderDep, loop: LoopDep
) -> Response:
    """The loop page: rounds table, charts across rounds, shifted features (any signed-in role)."""
    reports = service.loop_reports(session, loop=loop, cache=cache)
    context = page.loop_page_context(loop, reports)
    return templates.TemplateResponse(
        request, "loop.html", {**context, "this_loop": loop, "caller": caller}
    )
