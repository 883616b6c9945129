"""The schema comes only from Alembic migrations, and they agree with the models."""

from __future__ import annotations

from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import inspect

from expertloop.migrations_state import current_and_head
from expertloop.models import Base, import_all_tables


def test_models_and_migrations_agree(engine):
    import_all_tables()
    with engine.connect() as conn:
        context = MigrationContext.configure(conn, opts={"compare_type": True})
        differences = compare_metadata(context, Base.metadata)
    assert differences == []


def test_store_is_at_the_newest_migration(engine):
    with engine.connect() as conn:
        current, head = current_and_head(conn)
    assert current == head and head is not None


def test_every_model_table_exists(engine):
    import_all_tables()
    assert set(Base.metadata.tables) <= set(inspect(engine).get_table_names())


def test_readiness_reports_the_schema(client):
    ready = client.get("/readyz")
    assert ready.status_code == 200 and ready.json()["status"] == "ready"
    assert client.get("/healthz").json() == {"status": "ok"}
