"""Browser sign-in and sign-out pages, the home page, and who-am-I for API clients."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from app.auth import service
from app.deps import (
    SESSION_COOKIE,
    ReaderDep,
    SessionDep,
    SettingsDep,
    WriterSessionDep,
)
from app.loops import service as loops_service
from app.templating import templates

router = APIRouter(tags=["access"])


def _safe_next(target: str) -> str:
    # only same-site paths, so the sign-in form cannot bounce a user to another site
    return target if target.startswith("/") and not target.startswith("//") else "/"


@router.get("/login", response_class=HTMLResponse)
def login_page(request: Request, next: str = "/") -> Response:
    """The sign-in form (public)."""
    return templates.TemplateResponse(
        request, "login.html", {"next_url": _safe_next(next), "error": None, "caller": None}
    )


@router.post("/login")
def login(
    request: Request,
    session: WriterSessionDep,
    settings: SettingsDep,
    name: Annotated[str, Form()],
    password: Annotated[str, Form()],
    next: Annotated[str, Form()] = "/",
) -> Response:
    """Check name and password; set the session cookie (public)."""
    opened = service.sign_in(session, name=name, password=password, hours=settings.session_hours)
    if opened is None:
        context: dict[str, Any] = {
            "next_url": _safe_next(next),
            "error": "Name or password is wrong.",
            "caller": None,
        }
        return templates.TemplateResponse(request, "login.html", context, status_code=401)
    session_id, _csrf = opened
    response = RedirectResponse(_safe_next(next), status_code=303)
    response.set_cookie(
        SESSION_COOKIE,
        session_id,
        max_age=int(settings.session_hours * 3600),
        httponly=True,
        samesite="lax",
        secure=request.url.scheme == "https",
        path="/",
    )
    return response


@router.post("/logout")
def logout(request: Request, session: WriterSessionDep, _: ReaderDep) -> Response:
    """End the browser session (any signed-in role; the form carries the CSRF token)."""
    cookie = request.cookies.get(SESSION_COOKIE)
    if cookie:
        service.sign_out(session, session_id=cookie)
    response = RedirectResponse("/login", status_code=303)
    response.delete_cookie(SESSION_COOKIE, path="/")
    return response


@router.get("/", response_class=HTMLResponse)
def home(request: Request, session: SessionDep, caller: ReaderDep) -> Response:
    """The list of loops (any signed-in role)."""
    loops = loops_service.list_loops(session)
    return templates.TemplateResponse(request, "home.html", {"loops": loops, "caller": caller})


@router.get("/api/me")
def me(caller: ReaderDep) -> dict[str, Any]:
    """Who the credentials belong to (any role)."""
    return {"name": caller.user.name, "roles": caller.user.roles}
