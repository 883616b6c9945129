"""Declarative base and the one MetaData; imports every domain's tables so Alembic sees them."""

from __future__ import annotations

from datetime import UTC, datetime

from sqlalchemy import DateTime, Dialect, MetaData
from sqlalchemy.orm import DeclarativeBase
from sqlalchemy.types import TypeDecorator

NAMING_CONVENTION = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


class Base(DeclarativeBase):
    """Base of every table; one MetaData with a naming convention for stable migrations."""

    metadata = MetaData(naming_convention=NAMING_CONVENTION)


class UTCDateTime(TypeDecorator[datetime]):
    """A timestamp that is timezone-aware UTC on both backends, written and read.

    PostgreSQL keeps the zone (timestamptz); SQLite stores text without one and hands values back
    naive. Values are converted to UTC on the way in (a naive value counts as UTC, the only
    clock the store uses) and come back with UTC attached, so no reader needs its own fix.
    """

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)

    def process_result_value(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


def utcnow() -> datetime:
    """Timezone-aware now, the only clock the store uses."""
    return datetime.now(UTC)


def import_all_tables() -> None:
    """Import every domain's table module so Base.metadata is complete."""
    from .auth import models as _auth  # noqa: F401
    from .ingest import models as _ingest  # noqa: F401
    from .jobs import models as _jobs  # noqa: F401
    from .loops import models as _loops  # noqa: F401
    from .queue import models as _queue  # noqa: F401
    from .sampler import models as _sampler  # noqa: F401
    from .snapshots import models as _snapshots  # noqa: F401
