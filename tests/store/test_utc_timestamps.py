"""Every stored timestamp comes back timezone-aware in UTC, on SQLite and on PostgreSQL.

SQLite keeps no zone with a timestamp; the one column type (expertloop.models.UTCDateTime)
converts on the way in and attaches UTC on the way out, so readers never fix values themselves.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone

from sqlalchemy import select
from sqlalchemy.orm import Session

from expertloop.loops.models import Loop, Round
from expertloop.models import Base, UTCDateTime, import_all_tables


def test_every_timestamp_column_uses_the_one_type() -> None:
    import_all_tables()
    for table in Base.metadata.tables.values():
        for column in table.columns:
            if column.type.python_type is datetime:
                assert isinstance(column.type, UTCDateTime), f"{table.name}.{column.name}"


def test_aware_naive_and_other_zones_come_back_as_the_same_utc_instant(engine) -> None:
    plus_two = datetime(2026, 6, 1, 14, 30, tzinfo=timezone(timedelta(hours=2)))
    naive_utc = datetime(2026, 6, 1, 12, 30)  # a naive value counts as UTC
    with Session(engine) as session:
        loop = Loop(
            slug="clock-check",
            title="Clock check (test)",
            features=[{"name": "x", "unit": ""}],
            action_space={"kind": "discrete", "actions": ["a", "b"]},
            settings={},
            created_at=plus_two,
        )
        session.add(loop)
        session.flush()
        session.add(Round(loop_id=loop.id, number=0, learner_version="demo", opened_at=naive_utc))
        session.commit()
    with Session(engine) as session:
        created = session.scalar(select(Loop.created_at).where(Loop.slug == "clock-check"))
        opened = session.scalar(select(Round.opened_at))
    expected = datetime(2026, 6, 1, 12, 30, tzinfo=UTC)
    for value in (created, opened):
        assert value is not None and value.utcoffset() == timedelta(0)
        assert value == expected
