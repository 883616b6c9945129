"""Fixtures for queue tests: a loop with an open round, uploaded rollouts, and queued states."""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from sqlalchemy import select

from expertloop.auth.models import User
from expertloop.ingest.models import Rollout, Step
from expertloop.loops import service as loops_service
from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC, discrete_rows, parquet_bytes
from tests.serving import enqueue_steps

SCENE = {
    "frame": "robot",
    "agents": [
        {"kind": "pedestrian", "x": 4.0, "y": 1.5, "heading": 3.14},
        {"kind": "forklift", "x": 7.5, "y": -2.0, "heading": 1.57},
    ],
}


def continuous_rows(n_rollouts: int = 2, steps: int = 10, *, seed: int = 0) -> dict[str, list]:
    """Columns of a small continuous rollout file (two features, two action dimensions)."""
    rng = np.random.default_rng(seed)
    cols: dict[str, list[Any]] = {
        k: [] for k in ("rollout", "step", "time_s", "features", "learner_action")
    }
    for r in range(n_rollouts):
        for s in range(steps):
            cols["rollout"].append(f"c{r}")
            cols["step"].append(s)
            cols["time_s"].append(0.1 * s)
            cols["features"].append(rng.normal(size=2).round(3).tolist())
            cols["learner_action"].append([float(rng.uniform(0, 2)), float(rng.uniform(-0.2, 0.2))])
    return cols


def with_scene(cols: dict[str, list]) -> dict[str, list]:
    """Add the same scene description to every row (JSON text, as Parquet files carry it)."""
    return {**cols, "scene": [json.dumps(SCENE)] * len(cols["rollout"])}


@pytest.fixture
def make_loop(client, admin, uploader, app) -> Callable[..., str]:
    """Create a loop with round 1 holding uploaded rollouts; queue its states in step-id order.

    Returns the loop slug. Queued: `queue` states (None: all) from position `start` in
    (rollout, step) order.
    """

    def make(
        spec: dict[str, Any] = DISCRETE_SPEC,
        settings: dict[str, Any] | None = None,
        columns: dict[str, list] | None = None,
        queue: int | None = None,
        seed: int = 0,
        start: int = 0,
    ) -> str:
        body = {**spec, "settings": settings or {}}
        created = client.post("/api/loops", json=body, headers=admin)
        assert created.status_code == 201, created.text
        slug = spec["slug"]
        opened = client.post(
            f"/api/loops/{slug}/rounds", json={"learner_version": "v1"}, headers=admin
        )
        assert opened.status_code == 201, opened.text
        if columns is None:
            columns = (
                discrete_rows(2, 10)
                if spec["action_space"]["kind"] == "discrete"
                else continuous_rows()
            )
        uploaded = client.post(
            f"/api/loops/{slug}/rounds/1/rollouts",
            files={"file": ("r.parquet", parquet_bytes(columns))},
            headers=uploader,
        )
        assert uploaded.status_code == 201, uploaded.text
        with app.state.session_factory() as session:
            loop = loops_service.get_loop(session, slug=slug)
            rnd = loops_service.get_round(session, loop=loop, number=1)
            step_ids = list(
                session.scalars(
                    select(Step.id)
                    .join(Rollout, Rollout.id == Step.rollout_id)
                    .where(Step.round_id == rnd.id)
                    .order_by(Rollout.key, Step.step_index)
                )
            )
            enqueue_steps(
                session,
                rnd=rnd,
                loop=loop,
                step_ids=step_ids[start:] if queue is None else step_ids[start : start + queue],
                seed=seed,
            )
            session.commit()
        return slug

    return make


@pytest.fixture
def discrete_loop(make_loop) -> str:
    return make_loop(DISCRETE_SPEC)


@pytest.fixture
def continuous_loop(make_loop) -> str:
    return make_loop(CONTINUOUS_SPEC)


def user_id(app: Any, name: str) -> int:
    """The id of a user by name."""
    with app.state.session_factory() as session:
        found = session.scalar(select(User.id).where(User.name == name))
    assert found is not None
    return int(found)
