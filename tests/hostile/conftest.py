"""Hostile-input corpus: every case asserts the status, a message naming the problem, a store
with the same number of rows in every table, and a server that still answers afterwards.

Each case runs on the backend the suite runs on (EXPERTLOOP_TEST_DATABASE_URL picks PostgreSQL).
"""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import Any

import pytest
from sqlalchemy import Engine, inspect, text

from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC

SLUG = DISCRETE_SPEC["slug"]
CONTINUOUS_SLUG = CONTINUOUS_SPEC["slug"]
# An answer to a hostile request never repeats much of it: well under a kilobyte.
MAX_ERROR_BYTES = 2048


def row_counts(engine: Engine) -> dict[str, int]:
    """Rows in every table of the store."""
    with engine.connect() as conn:
        return {
            table: conn.execute(text(f"SELECT COUNT(*) FROM {table}")).scalar_one()
            for table in sorted(inspect(conn).get_table_names())
        }


@pytest.fixture
def settings(settings):
    """The suite's settings with small upload limits, so the corpus stays small and quick."""
    return settings.model_copy(
        update={"max_image_bytes": 4096, "max_scene_bytes": 8192, "max_array_bytes": 8 << 20}
    )


@pytest.fixture
def loops(client, admin) -> dict[str, str]:
    """A discrete and a continuous loop, each with round 1 open."""
    for spec in (DISCRETE_SPEC, CONTINUOUS_SPEC):
        assert client.post("/api/loops", json=spec, headers=admin).status_code == 201
        opened = client.post(
            f"/api/loops/{spec['slug']}/rounds", json={"learner_version": "v1"}, headers=admin
        )
        assert opened.status_code == 201, opened.text
    return {"discrete": SLUG, "continuous": CONTINUOUS_SLUG}


@pytest.fixture
def refused(client, engine) -> Callable[..., Any]:
    """Send a request; assert its status, a message matching `names`, an unchanged store and a
    healthy server afterwards. Returns the response."""

    def check(send: Callable[[], Any], status: int, names: str) -> Any:
        before = row_counts(engine)
        response = send()
        assert response.status_code == status, response.text[:500]
        assert len(response.content) <= MAX_ERROR_BYTES, len(response.content)
        detail = response.json()["detail"]
        assert isinstance(detail, str)
        assert re.search(names, detail, re.IGNORECASE), detail
        assert "/tmp" not in detail and "upload-" not in detail, detail
        assert row_counts(engine) == before
        assert client.get("/healthz").status_code == 200
        return response

    return check
