"""Browser sign-in and sign-out pages, and who-am-I for API clients."""

from __future__ import annotations

import hmac
from typing import Annotated, Any

from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from ..deps import (
    SESSION_COOKIE,
    ReaderDep,
    SessionDep,
    SettingsDep,
    WriterSessionDep,
)
from ..error_pages import safe_next
from ..templating import templates
from . import security, service
from .throttle import SignInThrottle

router = APIRouter(tags=["access"])

# Sign-in CSRF: a pre-session token, set as a cookie with the form and sent back in it (double
# submit). SameSite=Strict keeps another site's form from carrying the cookie, so it cannot sign
# a visitor into the other site's account here.
SIGN_IN_CSRF_COOKIE = "expertloop_signin_csrf"
HTML: dict[str, Any] = {"content": {"text/html": {}}}


def _form(
    request: Request,
    next_url: str,
    error: str | None,
    status_code: int,
    name: str = "",
    **headers: str,
) -> Response:
    token = security.new_csrf_token()
    context = {"next_url": safe_next(next_url), "error": error, "caller": None}
    # the name is kept after a refusal, so a mistyped password costs only the password
    context |= {"csrf_token": token, "name": name}
    response = templates.TemplateResponse(
        request,
        "login.html",
        context,
        status_code=status_code,
        headers=headers or None,
    )
    response.set_cookie(
        SIGN_IN_CSRF_COOKIE,
        token,
        httponly=True,
        samesite="strict",
        secure=request.url.scheme == "https",
        path="/login",
    )
    return response


# First in the router, which is first in the app (app/main.py): routes are tried in order.
@router.get("/api/me")
async def me(caller: ReaderDep) -> dict[str, Any]:
    """Who the credentials belong to (any role)."""
    # async: nothing here blocks, so the answer needs no trip through the thread pool
    return {"name": caller.user.name, "roles": caller.user.roles}


@router.get("/login", response_class=HTMLResponse)
def login_page(request: Request, next: str = "/") -> Response:
    """The sign-in form (public)."""
    return _form(request, next, None, 200)


@router.post(
    "/login",
    responses={
        303: {"description": "Signed in: on to `next`."},
        401: {"description": "Name or password is wrong.", **HTML},
        403: {"description": "The form's CSRF token is missing or wrong.", **HTML},
        429: {"description": "Too many failed attempts; see Retry-After.", **HTML},
    },
)
def login(
    request: Request,
    session: SessionDep,
    settings: SettingsDep,
    name: Annotated[str, Form()],
    password: Annotated[str, Form()],
    next: Annotated[str, Form()] = "/",
    csrf_token: Annotated[str, Form()] = "",
) -> Response:
    """Check name and password; set the session cookie (public)."""
    expected = request.cookies.get(SIGN_IN_CSRF_COOKIE, "")
    if not expected or not hmac.compare_digest(csrf_token.encode(), expected.encode()):
        return _form(request, next, "The sign-in form had expired. Please sign in again.", 403)
    throttle: SignInThrottle = request.app.state.sign_in_throttle
    address = request.client.host if request.client else "unknown"
    wait_s = throttle.retry_after_s(name=name, address=address)
    if wait_s:
        error = f"Too many failed sign-ins. Try again in {wait_s} seconds."
        return _form(request, next, error, 429, **{"Retry-After": str(wait_s)})
    opened = service.sign_in(session, name=name, password=password, hours=settings.session_hours)
    if opened is None:
        throttle.failed(name=name, address=address)
        return _form(request, next, "Name or password is wrong.", 401, name=name)
    throttle.succeeded(name=name)
    session_id, _csrf = opened
    response = RedirectResponse(safe_next(next), status_code=303)
    response.set_cookie(
        SESSION_COOKIE,
        session_id,
        max_age=int(settings.session_hours * 3600),
        httponly=True,
        samesite="lax",
        secure=request.url.scheme == "https",
        path="/",
    )
    response.delete_cookie(SIGN_IN_CSRF_COOKIE, path="/login")
    return response


@router.post(
    "/logout",
    response_class=RedirectResponse,
    status_code=303,
    responses={303: {"description": "Signed out: to the sign-in form."}},
)
def logout(request: Request, session: WriterSessionDep, _: ReaderDep) -> Response:
    """End the browser session (any signed-in role; the form carries the CSRF token)."""
    cookie = request.cookies.get(SESSION_COOKIE)
    if cookie:
        service.sign_out(session, session_id=cookie)
    response = RedirectResponse("/login", status_code=303)
    response.delete_cookie(SESSION_COOKIE, path="/")
    return response
