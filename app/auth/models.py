"""Tables for users, their API tokens and browser sessions, and the counter of their changes."""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import JSON, BigInteger, Boolean, ForeignKey, Integer, String
from sqlalchemy.orm import Mapped, mapped_column

from ..models import Base, UTCDateTime, utcnow


class User(Base):
    """A person or a machine account, holding one or more roles."""

    __tablename__ = "users"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(100), unique=True)
    roles: Mapped[list[str]] = mapped_column(JSON)
    password_hash: Mapped[str | None] = mapped_column(String(300), nullable=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    active: Mapped[bool] = mapped_column(Boolean, default=True)


class ApiToken(Base):
    """A bearer token, stored only as its SHA-256 (the token itself has 256 random bits)."""

    __tablename__ = "api_tokens"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id", ondelete="CASCADE"), index=True)
    token_sha256: Mapped[str] = mapped_column(String(64), unique=True)
    prefix: Mapped[str] = mapped_column(String(12))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    revoked_at: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)


class BrowserSession(Base):
    """A signed-in browser: the cookie carries a random id stored here only as a hash."""

    __tablename__ = "browser_sessions"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id", ondelete="CASCADE"), index=True)
    session_sha256: Mapped[str] = mapped_column(String(64), unique=True)
    csrf_token: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    expires_at: Mapped[datetime] = mapped_column(UTCDateTime)
    ended_at: Mapped[datetime | None] = mapped_column(UTCDateTime, nullable=True)


# Every UPDATE or DELETE of these tables bumps access_version.version, by database triggers
# (migration 0010), so any change (by the service, a CLI in another process, or SQL typed by an
# operator) reaches every app process's identity cache on its next request. Keep per-request
# writes (a "last used" time, say) out of these tables: each would empty every cache.
WATCHED_TABLES = ("users", "api_tokens", "browser_sessions")


class AccessVersion(Base):
    """One row: how many times users, tokens or browser sessions changed (see app/auth/cache.py).

    The row may be missing (a store emptied table by table): that reads as version 0, and the
    next change puts it back.
    """

    __tablename__ = "access_version"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    version: Mapped[int] = mapped_column(BigInteger)
