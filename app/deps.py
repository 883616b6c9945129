"""Dependencies declared once: the store session, settings, and who is calling with which role."""

from __future__ import annotations

from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from typing import Annotated, Concatenate, ParamSpec, TypeVar

from anyio import CancelScope, CapacityLimiter, to_thread
from fastapi import Depends, Request
from sqlalchemy.exc import InterfaceError, OperationalError
from sqlalchemy.orm import Session, sessionmaker

from .auth.identify import SAFE_METHODS, SESSION_COOKIE, Caller, identify
from .config import Settings
from .errors import Forbidden, Unauthenticated

P = ParamSpec("P")
T = TypeVar("T")

CSRF_HEADER = "x-csrf-token"
CSRF_FIELD = "csrf_token"


def _close(session: Session) -> None:
    try:
        session.close()
    except (OperationalError, InterfaceError) as exc:
        # The store went away during the request, so closing (a ROLLBACK) failed on a dead
        # connection, which SQLAlchemy has already dropped from the pool. For a read session
        # this runs after the answer was sent: raising here would cut the client's connection
        # instead of leaving it the answer it got (or the 503 for the error the request itself
        # met).
        if not exc.connection_invalidated:
            raise


async def _in_thread_shielded(work: Callable[[Session], None], session: Session) -> None:
    """Run work on the session in the thread pool even if the request is being cancelled, with
    a limiter of its own (as FastAPI does for a sync dependency's exit): a pool whose threads
    all wait for store connections must not keep the session that would free one from
    committing or closing."""
    with CancelScope(shield=True):
        await to_thread.run_sync(work, session, limiter=CapacityLimiter(1))


@asynccontextmanager
async def _request_session(factory: sessionmaker[Session]) -> AsyncIterator[Session]:
    # Made on the event loop: a new session holds no connection until its first statement, so
    # making one does no I/O, and a sync dependency's entry would cost a trip through the thread
    # pool on every request. Closing a session in a transaction (a ROLLBACK, the connection back
    # to the pool) is I/O and runs in the pool; one whose work ended with a commit (a queue
    # submit's write transaction) holds no connection, and closing it only forgets its objects.
    session = factory()
    try:
        yield session
    finally:
        if session.in_transaction():
            await _in_thread_shielded(_close, session)
        else:
            session.close()


def queue_thread_limiter(settings: Settings, dialect: str) -> CapacityLimiter:
    """The turns of the pool that annotators' queue requests take (`in_queue_thread`).

    Thirty-two annotators clicking at once made thirty-two threads trade the interpreter lock:
    a claim's write transaction, which holds SQLite's one writer, was stretched by every switch.
    Two turns on SQLite (one writes while the other builds an answer) and four on PostgreSQL
    (whose row locks let claims proceed side by side) measured best (README, Benchmarks)."""
    turns = settings.queue_threads or (2 if dialect == "sqlite" else 4)
    return CapacityLimiter(turns)


async def in_queue_thread(
    request: Request,
    session: Session,
    work: Callable[Concatenate[Session, P], T],
    *args: P.args,
    **kwargs: P.kwargs,
) -> T:
    """`work(session, ...)`: a queue route's store work, all of it, in one trip through the
    thread pool within the queue's own turns, the session closed at its end in the same trip.
    A sync route and its sync dependencies would take a trip each, and closing a session still
    in a transaction one more."""

    def trip() -> T:
        try:
            return work(session, *args, **kwargs)
        finally:
            _close(session)

    limiter: CapacityLimiter = request.app.state.queue_threads
    return await to_thread.run_sync(trip, limiter=limiter)


async def get_session(request: Request) -> AsyncIterator[Session]:
    """A store session for one request: for reads, and for services that open their own write
    transactions (`write_transaction`)."""
    async with _request_session(request.app.state.session_factory) as session:
        yield session


def get_app_settings(request: Request) -> Settings:
    """The settings the running app was created with (tests pass their own)."""
    settings: Settings = request.app.state.settings
    return settings


async def get_writer_session(request: Request) -> AsyncIterator[Session]:
    """The unit of work of a route that writes: committed when the route returns, before the
    answer is sent (so a failed commit is the answer), rolled back when it raises. Its
    transactions take SQLite's write lock at BEGIN (see app.db.make_writer_session_factory).
    Services only flush; contended writes (queue claims, submits) frame their own short
    transactions with `write_transaction` instead. The commit runs in the thread pool: it is
    I/O, and a commit that changed who may sign in waits there (app/auth/changes.py)."""
    async with _request_session(request.app.state.writer_session_factory) as session:
        yield session
        await _in_thread_shielded(Session.commit, session)


def get_session_factory(request: Request) -> sessionmaker[Session]:
    """Sessions for work that outlives the request's own session (a streamed export)."""
    factory: sessionmaker[Session] = request.app.state.session_factory
    return factory


SessionDep = Annotated[Session, Depends(get_session)]
SessionFactoryDep = Annotated[sessionmaker[Session], Depends(get_session_factory)]
# scope="function": the commit after `yield` runs before the answer is sent, not after it
WriterSessionDep = Annotated[Session, Depends(get_writer_session, scope="function")]
SettingsDep = Annotated[Settings, Depends(get_app_settings)]


class Roles:
    """Dependency that admits callers holding any of `roles` (admin is always admitted).

    Every route declares one; tests/access/test_role_matrix.py checks each route against its
    declared roles.
    """

    def __init__(self, *roles: str) -> None:
        self.roles = frozenset(roles) | {"admin"}

    async def __call__(self, request: Request) -> Caller:
        # a safe method carries no CSRF token: skip reading the cookies, costly next to the rest
        sent_csrf = None if request.method in SAFE_METHODS else await _sent_csrf(request)
        caller = await identify(request, sent_csrf)
        if caller is None:
            raise Unauthenticated("sign in or send a valid API token (Authorization: Bearer ...)")
        if self.roles.isdisjoint(caller.user.roles):
            needed = ", ".join(sorted(self.roles))
            raise Forbidden(f"this needs one of the roles: {needed}")
        return caller


async def _sent_csrf(request: Request) -> str | None:
    """The CSRF token a state-changing page request carries, in its header or its form."""
    cookie_auth = SESSION_COOKIE in request.cookies and not request.headers.get("authorization")
    if request.method in SAFE_METHODS or not cookie_auth:
        return None
    sent = request.headers.get(CSRF_HEADER)
    if sent is None and request.headers.get("content-type", "").startswith(
        ("application/x-www-form-urlencoded", "multipart/form-data")
    ):
        form = await request.form()
        value = form.get(CSRF_FIELD)
        sent = value if isinstance(value, str) else None
    return sent


AdminDep = Annotated[Caller, Depends(Roles("admin"))]
UploaderDep = Annotated[Caller, Depends(Roles("uploader"))]
AnnotatorDep = Annotated[Caller, Depends(Roles("annotator"))]
TrainerDep = Annotated[Caller, Depends(Roles("trainer"))]
# Anyone signed in with any role may read loop metadata and reports.
ReaderDep = Annotated[Caller, Depends(Roles("uploader", "annotator", "trainer"))]
