"""Errors answered as pages in the site's layout for browser routes; API routes keep JSON.

A browser route is any path outside /api/ and the machine endpoints (health, readiness,
metrics), unless the client asks for JSON only. A signed-out browser is sent to the sign-in
form with the page it wanted as `next`.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any
from urllib.parse import quote

from fastapi import Request
from fastapi.responses import JSONResponse, RedirectResponse, Response

from .limits import name_problem
from .templating import templates

MACHINE_PATHS = frozenset({"/healthz", "/readyz", "/metrics", "/openapi.json"})

TITLES = {
    401: "Please sign in",
    403: "Not for your role",
    404: "No such page",
    405: "Not available this way",
    409: "That did not fit",
    413: "Too large",
    422: "That was not understood",
    503: "Back in a moment",
}


def is_page_path(path: str) -> bool:
    """Whether errors at this path are pages for a browser (unless it asks for JSON only)."""
    return not (path.startswith(("/api/", "/static/")) or path == "/api" or path in MACHINE_PATHS)


def wants_page(request: Request) -> bool:
    """Whether an error for this request should be a page rather than JSON."""
    if not is_page_path(request.url.path):
        return False
    accept = request.headers.get("accept", "")
    return not ("application/json" in accept and "text/html" not in accept)


def safe_next(target: str) -> str:
    """`target` if it is a path on this site, else "/": the sign-in form never leaves the site.

    Refused: anything not starting with one "/", a second "/" or a backslash right after it
    (browsers read "/\\host" as "//host"), and control characters.
    """
    if not target.startswith("/") or target[1:2] in ("/", "\\") or "\\" in target:
        return "/"
    # control characters cannot go into a Location header; overlong paths are not ours
    return target if name_problem(target, max_chars=2000) is None else "/"


def sign_in_redirect(request: Request) -> Response:
    """303 to the sign-in form, coming back to the page asked for."""
    wanted = request.url.path + (f"?{request.url.query}" if request.url.query else "")
    return RedirectResponse(f"/login?next={quote(safe_next(wanted), safe='')}", status_code=303)


def error_response(
    request: Request, status: int, message: Any, headers: Mapping[str, str] | None = None
) -> Response:
    """The error as a page for browser routes, as `{"detail": ...}` JSON for the rest."""
    if not wants_page(request):
        return JSONResponse({"detail": message}, status_code=status, headers=headers)
    if status == 401 and "authorization" not in request.headers:
        return sign_in_redirect(request)
    if status == 404 and message == "Not Found":  # routing's own wording
        message = f"nothing is at {request.url.path} on this site"
    title = TITLES.get(status, "Something went wrong" if status >= 500 else "Not possible")
    context = {"caller": None, "status": status, "title": title, "message": message}
    return templates.TemplateResponse(
        request, "error.html", context, status_code=status, headers=dict(headers or {})
    )
