"""Process health and readiness: the only routes open without credentials, with the sign-in page."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse, Response
from sqlalchemy import text

from ..deps import AdminDep
from ..migrations_state import current_and_head
from .metrics import render

router = APIRouter(tags=["system"])


@router.get("/healthz")
async def healthz() -> dict[str, str]:
    """The process is up (public)."""
    # async: answered on the event loop itself, so a full thread pool cannot delay it
    return {"status": "ok"}


@router.get("/readyz")
def readyz(request: Request) -> JSONResponse:
    """The database answers and its schema is at the newest migration (public)."""
    engine = request.app.state.engine
    try:
        with engine.connect() as conn:
            conn.execute(text("SELECT 1"))
            current, head = current_and_head(conn)
    except Exception as exc:  # any driver error means "not ready", with its reason
        return JSONResponse({"status": "unavailable", "detail": str(exc)[:300]}, status_code=503)
    if current != head:
        return JSONResponse(
            {"status": "migrating", "detail": f"schema at {current}, newest is {head}"},
            status_code=503,
        )
    return JSONResponse({"status": "ready", "schema": current})


@router.get(
    "/metrics",
    response_class=Response,
    responses={
        200: {
            "description": "Prometheus text exposition format 0.0.4.",
            "content": {"text/plain": {"schema": {"type": "string"}}},
        }
    },
)
def metrics(request: Request, _: AdminDep) -> Response:
    """Prometheus metrics (admin: give the scraper an admin token)."""
    return Response(render(request.app.state.engine), media_type="text/plain; version=0.0.4")
