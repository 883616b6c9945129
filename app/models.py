"""Declarative base and the one MetaData; imports every domain's tables so Alembic sees them."""

from __future__ import annotations

from datetime import UTC, datetime

from sqlalchemy import MetaData
from sqlalchemy.orm import DeclarativeBase

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
