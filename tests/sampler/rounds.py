"""Upload a round's rollouts and rank it through the API, running the job in the test."""

from __future__ import annotations

from typing import Any

from expertloop.jobs import runner
from tests.helpers import DISCRETE_SPEC, parquet_bytes

SLUG = DISCRETE_SPEC["slug"]


def upload(client, headers, cols, number, slug=SLUG) -> None:
    response = client.post(
        f"/api/loops/{slug}/rounds/{number}/rollouts",
        files={"file": ("f.parquet", parquet_bytes(cols))},
        headers=headers,
    )
    assert response.status_code == 201, response.text


def rank(client, app, settings, admin, budget, seed=3, slug=SLUG, number=1) -> dict[str, Any]:
    """Request a ranking, run its job here and return the finished job."""
    started = client.post(
        f"/api/loops/{slug}/rounds/{number}/ranking",
        json={"budget": budget, "seed": seed},
        headers=admin,
    )
    assert started.status_code == 202, started.text
    assert runner.run_one(app.state.session_factory, settings, "test-worker")
    job = client.get(f"/api/jobs/{started.json()['job']['id']}", headers=admin).json()
    assert job["status"] == "done", job
    return job
