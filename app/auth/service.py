"""Store access for users, API tokens and browser sessions."""

from __future__ import annotations

from datetime import timedelta

from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from ..db import write_transaction
from ..errors import Conflict, InvalidInput, NotFound
from ..limits import name_problem
from ..models import utcnow

# imported for its Session hooks: changes of these tables wait out reused reads
from . import changes as _changes  # noqa: F401
from . import security
from .models import ApiToken, BrowserSession, User

ROLES = ("admin", "uploader", "annotator", "trainer")
USER_NAME_MAX_CHARS = 100
# Longer passwords are refused as wrong, after the same work as any other wrong one.
PASSWORD_MAX_CHARS = 1024


def create_user(
    session: Session, *, name: str, roles: list[str], password: str | None = None
) -> User:
    """Create a user with roles and, optionally, a browser password."""
    unknown = sorted(set(roles) - set(ROLES))
    if unknown or not roles:
        raise InvalidInput(f"roles must be among {list(ROLES)}; got {roles}")
    problem = name_problem(name, max_chars=USER_NAME_MAX_CHARS)
    if problem:
        raise InvalidInput(f"the user name {problem}")
    if session.scalar(select(User.id).where(User.name == name)) is not None:
        raise Conflict(f"user '{name}' already exists")
    user = User(
        name=name,
        roles=sorted(set(roles)),
        password_hash=security.hash_password(password) if password else None,
    )
    try:
        # a savepoint: a concurrent create of the same name is refused, not a server error
        with session.begin_nested():
            session.add(user)
    except IntegrityError as exc:
        raise Conflict(f"user '{name}' already exists") from exc
    return user


def get_user_by_name(session: Session, *, name: str) -> User:
    """The user with this name, or NotFound."""
    user = session.scalar(select(User).where(User.name == name))
    if user is None:
        raise NotFound(f"no user named '{name}'")
    return user


def set_password(session: Session, *, user: User, password: str) -> None:
    """Replace a user's browser password."""
    user.password_hash = security.hash_password(password)
    session.flush()


def list_users(session: Session) -> list[User]:
    """All users, oldest first."""
    return list(session.scalars(select(User).order_by(User.id)))


def issue_token(session: Session, *, user: User) -> str:
    """Create an API token for a user and return it; only its hash is kept."""
    token = security.new_api_token()
    session.add(
        ApiToken(user_id=user.id, token_sha256=security.sha256_hex(token), prefix=token[:10])
    )
    session.flush()
    return token


def revoke_token(session: Session, *, prefix: str) -> int:
    """Revoke every live token starting with `prefix`; returns how many."""
    if len(prefix) < 8:
        raise InvalidInput("give at least the first 8 characters of the token")
    now = utcnow()
    tokens = list(
        session.scalars(
            select(ApiToken).where(ApiToken.prefix == prefix[:10], ApiToken.revoked_at.is_(None))
        )
    )
    for token in tokens:
        token.revoked_at = now
    session.flush()
    return len(tokens)


def user_for_token(session: Session, *, token: str) -> User | None:
    """The active user owning a live token, or None."""
    row = session.execute(
        select(User, ApiToken.revoked_at)
        .join(ApiToken, ApiToken.user_id == User.id)
        .where(ApiToken.token_sha256 == security.sha256_hex(token))
    ).first()
    if row is None or row.revoked_at is not None or not row.User.active:
        return None
    return row.User


def sign_in(session: Session, *, name: str, password: str, hours: float) -> tuple[str, str] | None:
    """Check a password; on success open a browser session and return (session id, csrf).

    The slow hash runs with no transaction open, so a stream of wrong passwords never holds
    SQLite's write lock; an unknown name, a user without a password and a malformed attempt
    each cost the same hash as a wrong password, so answer times do not tell names apart.
    """
    usable = (
        name_problem(name, max_chars=USER_NAME_MAX_CHARS) is None
        and len(password) <= PASSWORD_MAX_CHARS
    )
    user = session.scalar(select(User).where(User.name == name)) if usable else None
    active = user if user is not None and user.active else None
    user_id, stored = (active.id, active.password_hash) if active else (None, None)
    session.rollback()  # end the read: nothing is held while hashing
    matches = security.verify_password(password if usable else "", stored or security.dummy_hash())
    if not (matches and stored and user_id is not None):
        return None
    session_id = security.new_session_id()
    csrf = security.new_csrf_token()
    with write_transaction(session):
        session.add(
            BrowserSession(
                user_id=user_id,
                session_sha256=security.sha256_hex(session_id),
                csrf_token=csrf,
                expires_at=utcnow() + timedelta(hours=hours),
            )
        )
    return session_id, csrf


def browser_session(session: Session, *, session_id: str) -> tuple[User, BrowserSession] | None:
    """The user and live session behind a cookie value, or None if unknown, ended or expired."""
    row = session.execute(
        select(User, BrowserSession)
        .join(BrowserSession, BrowserSession.user_id == User.id)
        .where(BrowserSession.session_sha256 == security.sha256_hex(session_id))
    ).first()
    if row is None:
        return None
    user, live = row
    if live.ended_at is not None or live.expires_at <= utcnow() or not user.active:
        return None
    return user, live


def sign_out(session: Session, *, session_id: str) -> None:
    """End a browser session."""
    found = session.scalar(
        select(BrowserSession).where(
            BrowserSession.session_sha256 == security.sha256_hex(session_id)
        )
    )
    if found is not None and found.ended_at is None:
        found.ended_at = utcnow()
        session.flush()


def set_roles(session: Session, *, user: User, roles: list[str]) -> None:
    """Replace a user's roles (the caller commits)."""
    unknown = sorted(set(roles) - set(ROLES))
    if unknown or not roles:
        raise InvalidInput(f"roles must be among {list(ROLES)}; got {roles}")
    user.roles = sorted(set(roles))
    session.flush()


def set_active(session: Session, *, user: User, active: bool) -> None:
    """Deactivate a user (tokens and sessions stop working at once) or activate them again.

    The user's labels and other records stay; the caller commits.
    """
    user.active = active
    session.flush()
