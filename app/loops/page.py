"""The home page: the list of loops (any signed-in role)."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, Response

from ..deps import ReaderDep, SessionDep
from ..templating import templates
from . import service

router = APIRouter(tags=["access"])


@router.get("/", response_class=HTMLResponse)
def home(request: Request, session: SessionDep, caller: ReaderDep) -> Response:
    """The list of loops (any signed-in role)."""
    loops = service.list_loops(session)
    return templates.TemplateResponse(request, "home.html", {"loops": loops, "caller": caller})
