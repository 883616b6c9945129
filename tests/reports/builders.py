"""Test builder for round reports: rollouts uploaded through the API, then a selection, queue
items and labels written straight through the ORM (the sampler and queue are built elsewhere)."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import select

from expertloop.auth.models import User
from expertloop.ingest.models import Rollout, Step
from expertloop.loops import service as loops_service
from expertloop.queue.models import ANSWER_ACTION, ANSWER_UNSURE, ITEM_DONE, Label, QueueItem
from expertloop.sampler.models import REASON_AUDIT, REASON_RANKED, SelectedState, Selection
from expertloop.shared.encode import FLOAT32_LE
from tests.helpers import parquet_bytes

T0 = datetime(2026, 3, 2, 8, 0, tzinfo=UTC)


def create_loop(client: Any, admin: dict[str, str], spec: dict[str, Any]) -> str:
    response = client.post("/api/loops", json=spec, headers=admin)
    assert response.status_code == 201, response.text
    return str(spec["slug"])


def open_round(client: Any, admin: dict[str, str], slug: str, version: str) -> None:
    response = client.post(
        f"/api/loops/{slug}/rounds", json={"learner_version": version}, headers=admin
    )
    assert response.status_code == 201, response.text


def upload_round(
    client: Any,
    uploader: dict[str, str],
    *,
    slug: str,
    number: int,
    features: np.ndarray,
    actions: np.ndarray,
    action_names: list[str] | None,
    prefix: str,
) -> list[str]:
    """Upload rollouts of shape (n_rollouts, steps, ...): round 0 as expert demonstrations
    (``actions`` are the expert's), later rounds as learner-driven (``actions`` the learner's).
    Discrete actions are indices (-1: none); continuous ones rows (nan: none). Returns keys."""
    n_rollouts, steps = features.shape[:2]
    columns: dict[str, list[Any]] = {
        k: [] for k in ("rollout", "step", "time_s", "features", "control", "learner_action")
    }
    columns["expert_action"] = []
    keys = [f"{prefix}{r:03d}" for r in range(n_rollouts)]
    for r in range(n_rollouts):
        for s in range(steps):
            action = actions[r, s]
            if action_names is not None:
                value: Any = None if action < 0 else action_names[int(action)]
            else:
                value = None if np.isnan(action).any() else [float(v) for v in action]
            columns["rollout"].append(keys[r])
            columns["step"].append(s)
            columns["time_s"].append(0.1 * s)
            columns["features"].append([float(v) for v in features[r, s]])
            columns["control"].append("expert" if number == 0 else "learner")
            columns["learner_action"].append(None if number == 0 else value)
            columns["expert_action"].append(value if number == 0 else None)
    response = client.post(
        f"/api/loops/{slug}/rounds/{number}/rollouts",
        files={"file": ("rollouts.parquet", parquet_bytes(columns))},
        headers=uploader,
    )
    assert response.status_code == 201, response.text
    return keys


def step_ids(app: Any, slug: str, keys: list[str], steps: int) -> np.ndarray:
    """Step ids as an array of shape (len(keys), steps), in the order of ``keys``."""
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=slug)
        rows = session.execute(
            select(Rollout.key, Step.step_index, Step.id)
            .join(Rollout, Rollout.id == Step.rollout_id)
            .where(Rollout.loop_id == loop.id, Rollout.key.in_(keys))
        ).all()
    grid = np.full((len(keys), steps), -1, dtype=np.int64)
    where = {k: i for i, k in enumerate(keys)}
    for key, index, step_id in rows:
        grid[where[key], index] = step_id
    assert (grid >= 0).all()
    return grid


def user_ids(app: Any, names: list[str]) -> dict[str, int]:
    with app.state.session_factory() as session:
        rows = session.execute(select(User.name, User.id).where(User.name.in_(names))).all()
    return {name: user_id for name, user_id in rows}


@dataclass
class LabelSpec:
    """One label to write: a discrete index, a continuous vector, or unsure."""

    step_id: int
    user_id: int
    action: int | None = None
    vector: list[float] | None = None
    unsure: bool = False
    at: datetime = T0
    span: bool = False  # a span copy of an answer given on a later state (no queue item)


def add_selection_and_labels(
    app: Any,
    *,
    slug: str,
    number: int,
    audit: list[int],
    ranked: list[int],
    shown: set[int],
    labels: list[LabelSpec],
) -> None:
    """Write the round's selection, one queue item per selected state (``shown``: step ids
    whose item shows the learner's action) and the labels, in the order given."""
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=slug)
        rnd = loops_service.get_round(session, loop=loop, number=number)
        selection = Selection(
            round_id=rnd.id,
            budget=len(audit) + len(ranked),
            seed=7,
            params={"built_by": "tests/reports/builders.py"},
            n_candidates=len(audit) + len(ranked),
            n_training=0,
        )
        session.add(selection)
        session.flush()
        items: dict[int, int] = {}
        for rank, (step_id, reason) in enumerate(
            [(s, REASON_RANKED) for s in ranked] + [(s, REASON_AUDIT) for s in audit]
        ):
            chosen = SelectedState(
                selection_id=selection.id,
                step_id=step_id,
                rank=rank,
                reason=reason,
                novelty=0.0,
                novelty_pct=0.0,
                score=0.0,
            )
            session.add(chosen)
            session.flush()
            item = QueueItem(
                round_id=rnd.id,
                step_id=step_id,
                selected_state_id=chosen.id,
                position=rank,
                labels_needed=2,
                labels_done=0,
                show_learner=step_id in shown,
                status=ITEM_DONE,
            )
            session.add(item)
            session.flush()
            items[step_id] = item.id
        for n, spec in enumerate(labels):
            vector = None
            if spec.vector is not None:
                vector = np.asarray(spec.vector, dtype=FLOAT32_LE).tobytes()
            session.add(
                Label(
                    item_id=None if spec.span else items.get(spec.step_id),
                    span=spec.span,
                    step_id=spec.step_id,
                    round_id=rnd.id,
                    user_id=spec.user_id,
                    submission_id=f"{slug}-{number}-{n}",
                    answer=ANSWER_UNSURE if spec.unsure else ANSWER_ACTION,
                    action=None if spec.unsure else spec.action,
                    action_vec=None if spec.unsure else vector,
                    learner_shown=spec.step_id in shown,
                    seconds_spent=5.0,
                    created_at=spec.at,
                )
            )
        session.commit()


def every(seconds: float, count: int, start: datetime = T0) -> list[datetime]:
    """``count`` submission times ``seconds`` apart."""
    return [start + timedelta(seconds=seconds * i) for i in range(count)]
