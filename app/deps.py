"""Dependencies declared once: the store session, settings, and who is calling with which role."""

from __future__ import annotations

import hmac
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.exc import InterfaceError, OperationalError
from sqlalchemy.orm import Session, sessionmaker
from starlette.concurrency import run_in_threadpool

from .auth import service as auth_service
from .auth.models import User
from .config import Settings
from .errors import Forbidden, Unauthenticated

SESSION_COOKIE = "expertloop_session"
CSRF_HEADER = "x-csrf-token"
CSRF_FIELD = "csrf_token"
SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


def _session_for_request(factory: sessionmaker[Session]) -> Iterator[Session]:
    session = factory()
    try:
        yield session
    finally:
        try:
            session.close()
        except (OperationalError, InterfaceError) as exc:
            # The store went away during the request, so closing (a ROLLBACK) failed on a dead
            # connection, which SQLAlchemy has already dropped from the pool. This runs after
            # the answer was sent: raising here would cut the client's connection instead of
            # leaving it the answer it got (or the 503 for the error the request itself met).
            if not exc.connection_invalidated:
                raise


def get_session(request: Request) -> Iterator[Session]:
    """A store session for one request: for reads, and for services that open their own write
    transactions (`write_transaction`)."""
    yield from _session_for_request(request.app.state.session_factory)


def get_app_settings(request: Request) -> Settings:
    """The settings the running app was created with (tests pass their own)."""
    settings: Settings = request.app.state.settings
    return settings


def get_writer_session(request: Request) -> Iterator[Session]:
    """The unit of work of a route that writes: committed when the route returns, before the
    answer is sent (so a failed commit is the answer), rolled back when it raises. Its
    transactions take SQLite's write lock at BEGIN (see app.db.make_writer_session_factory).
    Services only flush; contended writes (queue claims, submits) frame their own short
    transactions with `write_transaction` instead."""
    for session in _session_for_request(request.app.state.writer_session_factory):
        yield session
        session.commit()


SessionDep = Annotated[Session, Depends(get_session)]
# scope="function": the commit after `yield` runs before the answer is sent, not after it
WriterSessionDep = Annotated[Session, Depends(get_writer_session, scope="function")]
SettingsDep = Annotated[Settings, Depends(get_app_settings)]


@dataclass
class Caller:
    """Who made a request, and how: by API token or by browser session (with its CSRF token)."""

    user: User
    csrf_token: str | None = None

    @property
    def user_id(self) -> int:
        return self.user.id


class Roles:
    """Dependency that admits callers holding any of `roles` (admin is always admitted).

    Every route declares one; tests/access/test_role_matrix.py checks each route against its
    declared roles.
    """

    def __init__(self, *roles: str) -> None:
        self.roles = frozenset(roles) | {"admin"}

    async def __call__(self, request: Request) -> Caller:
        sent_csrf = await _sent_csrf(request)
        # The store lookups are blocking: run them off the event loop, which must stay free to
        # finish other requests (and so hand back their pooled connections). They use a short
        # read session of their own, so the route's session starts its transactions afresh.
        caller = await run_in_threadpool(_identify, request, sent_csrf)
        if caller is None:
            raise Unauthenticated("sign in or send a valid API token (Authorization: Bearer ...)")
        if not self.roles & set(caller.user.roles):
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


def _identify(request: Request, sent_csrf: str | None) -> Caller | None:
    with request.app.state.session_factory() as session:
        return _lookup(request, session, sent_csrf)


def _lookup(request: Request, session: Session, sent_csrf: str | None) -> Caller | None:
    header = request.headers.get("authorization", "")
    if header:
        scheme, _, token = header.partition(" ")
        if scheme.lower() != "bearer" or not token.strip():
            return None
        user = auth_service.user_for_token(session, token=token.strip())
        return Caller(user=user) if user else None
    cookie = request.cookies.get(SESSION_COOKIE)
    if not cookie:
        return None
    found = auth_service.browser_session(session, session_id=cookie)
    if found is None:
        return None
    user, live = found
    if request.method not in SAFE_METHODS:
        if not sent_csrf or not hmac.compare_digest(sent_csrf, live.csrf_token):
            raise Forbidden("missing or wrong CSRF token; reload the page and try again")
    return Caller(user=user, csrf_token=live.csrf_token)


AdminDep = Annotated[Caller, Depends(Roles("admin"))]
UploaderDep = Annotated[Caller, Depends(Roles("uploader"))]
AnnotatorDep = Annotated[Caller, Depends(Roles("annotator"))]
TrainerDep = Annotated[Caller, Depends(Roles("trainer"))]
# Anyone signed in with any role may read loop metadata and reports.
ReaderDep = Annotated[Caller, Depends(Roles("uploader", "annotator", "trainer"))]
