"""Who is calling: the credential a request carries (API token or session cookie), its owner
from this process's identity cache while the store's access version is unchanged, else from the
store (app/auth/cache.py says why that keeps every change immediate)."""

from __future__ import annotations

import hmac
import time
from dataclasses import dataclass

from sqlalchemy.orm import Session, sessionmaker
from starlette.concurrency import run_in_threadpool
from starlette.requests import Request

from ..errors import Forbidden
from . import access_version, security
from . import service as auth_service
from .cache import Identity, IdentityCache, Known
from .models import User

SESSION_COOKIE = "expertloop_session"
SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


@dataclass(frozen=True, slots=True)
class Caller:
    """Who made a request, and how: by API token or by browser session (with its CSRF token)."""

    user: Identity
    csrf_token: str | None = None

    @property
    def user_id(self) -> int:
        return self.user.id


def _credential(request: Request) -> tuple[str, str] | None:
    """("token", secret) for an Authorization header, ("session", secret) for the cookie."""
    header = request.headers.get("authorization", "")
    if header:
        scheme, _, token = header.partition(" ")
        if scheme.lower() != "bearer" or not token.strip():
            return None
        return "token", token.strip()
    cookie = request.cookies.get(SESSION_COOKIE)
    return ("session", cookie) if cookie else None


async def identify(request: Request, sent_csrf: str | None) -> Caller | None:
    """The caller, or None when the request carries no live credential.

    Raises Forbidden when a browser session's state-changing request lacks its CSRF token.
    """
    credential = _credential(request)
    if credential is None:
        return None
    kind, secret = credential
    key = f"{kind}:{security.sha256_hex(secret)}"
    state = request.app.state
    cache: IdentityCache = state.identity_cache
    known = cache.get(key)
    if known is not None and (known.expires_at is None or known.expires_at > time.time()):
        if await state.access_version.current() == known.version:
            return _admit(request, known, sent_csrf)
    # The store lookups are blocking: run them off the event loop, which must stay free to
    # finish other requests (and so hand back their pooled connections). They use a short
    # read session of their own, so the route's session starts its transactions afresh.
    known = await run_in_threadpool(_read, state.session_factory, cache, kind, secret)
    if known is None:
        cache.drop(key)
        return None
    cache.put(key, known)
    return _admit(request, known, sent_csrf)


def _read(
    factory: sessionmaker[Session], cache: IdentityCache, kind: str, secret: str
) -> Known | None:
    # The version is read first, in the same transaction: a change committed after it bumps
    # the version past the one the answer is tagged with, so the answer is not used again.
    read_at = cache.clock()
    with factory() as session:
        version = access_version.read(session)
        if kind == "token":
            user = auth_service.user_for_token(session, token=secret)
            return None if user is None else Known(_identity(user), version, read_at)
        found = auth_service.browser_session(session, session_id=secret)
        if found is None:
            return None
        user, live = found
        expires_at = live.expires_at.timestamp()
        return Known(_identity(user), version, read_at, live.csrf_token, expires_at)


def _identity(user: User) -> Identity:
    return Identity(id=user.id, name=user.name, roles=tuple(user.roles))


def _admit(request: Request, known: Known, sent_csrf: str | None) -> Caller:
    if known.csrf_token is not None and request.method not in SAFE_METHODS:
        if not sent_csrf or not hmac.compare_digest(sent_csrf, known.csrf_token):
            raise Forbidden("missing or wrong CSRF token; reload the page and try again")
    return Caller(user=known.identity, csrf_token=known.csrf_token)
