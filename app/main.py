"""create_app(): routers, templates, error handling and lifespan."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, Response
from fastapi.staticfiles import StaticFiles
from sqlalchemy.exc import DataError, InterfaceError, OperationalError
from sqlalchemy.exc import TimeoutError as PoolTimeout
from starlette.exceptions import HTTPException as StarletteHTTPException

from .auth.access_version import make_reader
from .auth.cache import IdentityCache
from .auth.throttle import Limits, SignInThrottle
from .config import Settings, get_settings
from .db import make_engine, make_session_factory, make_writer_session_factory
from .deps import queue_thread_limiter
from .error_pages import error_response
from .errors import ExpertloopError
from .ingest.image_store import PACK_SUFFIX, incoming_packs
from .ingest.logs.archive import SPOOL_PREFIX as BAG_SPOOL_PREFIX
from .ingest.spool import sweep_stale
from .job_handlers import register_job_handlers
from .jobs.runner import JobThread
from .limits import shown
from .openapi_errors import install as document_errors
from .request_guard import RefuseControlCharacters, RefuseOversized
from .security_headers import SecurityHeaders
from .shared.allocator import use_system_allocator
from .shared.bulk_reads import IDLE_CONNECTIONS
from .snapshots.files import SPOOL_SUFFIX
from .templating import STATIC_DIR


async def _domain_error(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, ExpertloopError)
    return error_response(request, exc.status_code, exc.message)


async def _http_error(request: Request, exc: Exception) -> Response:
    # routing's own errors (no such path, method not allowed), as pages for browsers
    assert isinstance(exc, StarletteHTTPException)
    return error_response(request, exc.status_code, exc.detail, headers=exc.headers)


async def _server_error(request: Request, exc: Exception) -> Response:
    # the traceback is still logged by the server; the person sees our page, not a bare 500
    return error_response(request, 500, "the service failed to answer this request")


async def _store_unreachable(request: Request, exc: Exception) -> Response:
    # Only connection-level failures land here; pool_pre_ping reconnects once the store is back.
    return error_response(
        request,
        503,
        "the database is unreachable right now; nothing was changed, try again shortly",
        headers={"Retry-After": "2"},
    )


async def _store_busy(request: Request, exc: Exception) -> Response:
    # No pooled connection came free within the pool timeout (app.db: at most pool size plus
    # overflow connections per process on PostgreSQL).
    return error_response(
        request,
        503,
        "the service is busy: no database connection came free in time; try again",
        headers={"Retry-After": "2"},
    )


async def _validation_error(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, RequestValidationError)
    problems = []
    errors = []
    for err in exc.errors():
        loc = [p if isinstance(p, int) else shown(str(p)) for p in err.get("loc", ())]
        msg = shown(str(err.get("msg")), 200)
        where = ".".join(str(p) for p in loc if p != "body")
        problems.append(f"{where}: {msg}" if where else msg)
        errors.append({"loc": loc, "msg": msg})
    return JSONResponse({"detail": "; ".join(problems), "errors": errors}, status_code=422)


async def _value_beyond_store(request: Request, exc: Exception) -> Response:
    # A backstop: validation keeps integers within the columns' ranges and NUL out of text
    # before any query; should a value slip through, the client still gets a 422, not a 500.
    return JSONResponse(
        {"detail": "a value in the request is outside what the store can hold"}, status_code=422
    )


def create_app(settings: Settings | None = None) -> FastAPI:
    """Build the application for the given settings (defaults: from the environment)."""
    settings = settings or get_settings()
    use_system_allocator()  # app.shared.allocator: memory goes back between bulk jobs
    engine = make_engine(settings.resolved_database_url)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        sweep_stale(settings.upload_dir)
        sweep_stale(settings.upload_dir, pattern=f"{BAG_SPOOL_PREFIX}*")
        sweep_stale(settings.snapshot_dir, pattern=f"loop-*/*{SPOOL_SUFFIX}")
        sweep_stale(incoming_packs(settings.blob_dir), pattern=f"*{PACK_SUFFIX}")
        runner = None
        if settings.job_mode == "thread":
            runner = JobThread(app.state.session_factory, settings)
            runner.start()
        yield
        if runner is not None:
            runner.stop()
        await app.state.access_version.close()
        engine.dispose()
        IDLE_CONNECTIONS.close()

    app = FastAPI(title="expertloop", version="0.1.0", lifespan=lifespan)
    app.state.settings = settings
    app.state.engine = engine
    app.state.session_factory = make_session_factory(engine)
    app.state.writer_session_factory = make_writer_session_factory(engine)
    app.state.queue_threads = queue_thread_limiter(settings, engine.dialect.name)
    app.state.known_loops = set()  # slugs of loops found (app/queue/router.py)
    # who each credential belongs to, kept while the store's access version stays the same
    app.state.identity_cache = IdentityCache()
    app.state.access_version = make_reader(engine)
    app.state.sign_in_throttle = SignInThrottle(
        Limits(
            per_name=settings.sign_in_failures_per_name,
            per_address=settings.sign_in_failures_per_address,
            window_s=settings.sign_in_window_seconds,
        )
    )
    app.add_exception_handler(ExpertloopError, _domain_error)
    app.add_exception_handler(RequestValidationError, _validation_error)
    app.add_exception_handler(OperationalError, _store_unreachable)
    app.add_exception_handler(InterfaceError, _store_unreachable)
    app.add_exception_handler(PoolTimeout, _store_busy)
    app.add_exception_handler(DataError, _value_beyond_store)
    app.add_exception_handler(OverflowError, _value_beyond_store)
    app.add_exception_handler(StarletteHTTPException, _http_error)
    app.add_exception_handler(Exception, _server_error)

    from .auth.router import router as auth_router
    from .ingest.router import router as ingest_router
    from .jobs.router import router as jobs_router
    from .loops.page import router as home_router
    from .loops.router import router as loops_router
    from .queue.router import router as queue_router
    from .reports.router import router as reports_router
    from .revisions.router import router as revisions_router
    from .sampler.router import router as sampler_router
    from .snapshots.router import router as snapshots_router
    from .system.router import router as system_router

    register_job_handlers()
    # A request is matched against the routes in this order, and each route passed over cost
    # about 1 us here: who-am-I and the annotators' queue come first, as the most frequent
    # calls. No path fits routes of two of these routers, so the order decides nothing else.
    routers = (
        auth_router,
        queue_router,
        system_router,
        home_router,
        loops_router,
        ingest_router,
        jobs_router,
        sampler_router,
        snapshots_router,
        revisions_router,
        reports_router,
    )
    # The routes join the app's own router rather than through include_router: FastAPI (from
    # 0.139) keeps an included router as a node that every request walks, matching the
    # chosen router's routes twice, which cost 14-18 of the 98 us of a GET /api/me in process
    # (README, "Request overhead"). Our routers set nothing at inclusion (their prefixes and
    # tags are already in their routes), so the routes are the same; only
    # app.dependency_overrides, which we do not use, would not reach them.
    for router in routers:
        app.router.routes.extend(router.routes)
    app.mount("/static", StaticFiles(directory=str(STATIC_DIR)), name="static")
    document_errors(
        app,
        routers,
        # POST /login declares its own 401, 403 and 429 (pages); GET /login gives none of them
        extra={"/api/loops/{slug}/rounds/{number}/rollouts": {413}},
    )

    app.add_middleware(RefuseOversized, max_upload_bytes=settings.max_upload_bytes)
    app.add_middleware(RefuseControlCharacters)
    app.add_middleware(SecurityHeaders)  # outermost: every answer gets the headers
    return app
