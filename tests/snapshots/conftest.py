"""Fixtures for snapshot tests: a small discrete loop with demonstrations, takeovers and labels."""

from __future__ import annotations

import io
import itertools
import struct
from collections.abc import Callable
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlalchemy import select

from expertloop.auth.models import User
from expertloop.ingest.models import Step
from expertloop.loops.models import Loop, Round
from expertloop.queue.models import ANSWER_ACTION, ANSWER_UNSURE, Label
from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC, discrete_rows, parquet_bytes

SLUG = DISCRETE_SPEC["slug"]
BASE = f"/api/loops/{SLUG}"
_submissions = itertools.count(1)


@pytest.fixture
def trainer(make_user: Callable[..., dict[str, str]]) -> dict[str, str]:
    return make_user("trainer", name="train-job")


@pytest.fixture
def annotator(make_user: Callable[..., dict[str, str]]) -> dict[str, str]:
    return make_user("annotator", name="expert-a")


def upload(client, headers, slug: str, number: int, columns: dict[str, list[Any]]) -> None:
    response = client.post(
        f"/api/loops/{slug}/rounds/{number}/rollouts",
        files={"file": ("f.parquet", parquet_bytes(columns))},
        headers=headers,
    )
    assert response.status_code == 201, response.text


# a later round-1 rollout: one learner-driven step, then a takeover
LATE_ROLLOUT: dict[str, list[Any]] = {
    "rollout": ["late"] * 2,
    "step": [0, 1],
    "time_s": [0.0, 0.1],
    "features": [[1.0, 2.0, 3.0], [1.5, 2.5, 3.5]],
    "control": ["learner", "expert"],
    "learner_action": ["proceed", None],
    "learner_probs": [[0.5, 0.25, 0.25], None],
    "expert_action": [None, "creep"],
}


def build_discrete(client, admin, uploader) -> None:
    """Round 0: 2 demonstrations x 3 steps; round 1 ("pol-1"): 2 rollouts x 5 steps, one
    takeover; round 2 ("pol-2") opened, empty."""
    client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    client.post(f"{BASE}/rounds", json={"learner_version": "pol-1"}, headers=admin)
    upload(client, uploader, SLUG, 0, discrete_rows(2, 3, expert=True, prefix="demo"))
    run = discrete_rows(2, 5, seed=1, prefix="run")
    run["control"][4] = "expert"
    run["expert_action"][4] = "hold"
    upload(client, uploader, SLUG, 1, run)


@pytest.fixture
def discrete_loop(client, admin, uploader) -> str:
    build_discrete(client, admin, uploader)
    return SLUG


class Labeller:
    """Adds labels straight through the ORM (the queue that normally writes them is elsewhere).

    Each label on a state comes from an annotator who has none there yet, as the queue stores
    them (one standing answer per annotator and state)."""

    def __init__(self, app: Any) -> None:
        self.app = app
        self.answered: dict[int, int] = {}  # step id -> annotators who labelled it so far
        with app.state.session_factory() as session:
            for n in range(6):
                if session.scalar(select(User).where(User.name == f"labeller-{n}")) is None:
                    session.add(User(name=f"labeller-{n}", roles=["annotator"]))
            session.commit()
            self.users = list(
                session.scalars(
                    select(User.id).where(User.name.like("labeller-%")).order_by(User.id)
                )
            )

    def learner_steps(self, slug: str, number: int) -> list[int]:
        with self.app.state.session_factory() as session:
            return list(
                session.scalars(
                    select(Step.id)
                    .join(Round, Round.id == Step.round_id)
                    .join(Loop, Loop.id == Round.loop_id)
                    .where(Loop.slug == slug, Round.number == number, Step.control == 0)
                    .order_by(Step.id)
                )
            )

    def add(self, slug: str, step_id: int, answers: list[Any]) -> None:
        """One label per answer, from different users who have not labelled the state yet: an
        action index, a vector, or None for "unsure"."""
        first = self.answered.get(step_id, 0)
        users = self.users[first : first + len(answers)]
        assert len(users) == len(answers), "more labels on one state than labellers"
        self.answered[step_id] = first + len(answers)
        with self.app.state.session_factory() as session:
            round_id = session.scalar(select(Step.round_id).where(Step.id == step_id))
            for user, answer in zip(users, answers, strict=True):
                vector = isinstance(answer, list | tuple)
                session.add(
                    Label(
                        step_id=step_id,
                        round_id=round_id,
                        user_id=user,
                        submission_id=f"sub-{next(_submissions)}",
                        answer=ANSWER_UNSURE if answer is None else ANSWER_ACTION,
                        action=None if answer is None or vector else answer,
                        action_vec=struct.pack(f"<{len(answer)}f", *answer) if vector else None,
                    )
                )
            session.commit()


@pytest.fixture
def labeller(app: Any) -> Labeller:
    return Labeller(app)


def build_continuous(client, admin, uploader) -> str:
    """A continuous loop: 4 demonstration steps, 6 learner steps in round 1."""
    client.post("/api/loops", json=CONTINUOUS_SPEC, headers=admin)
    slug = CONTINUOUS_SPEC["slug"]
    client.post(f"/api/loops/{slug}/rounds", json={"learner_version": "g-1"}, headers=admin)
    rng = np.random.default_rng(5)

    def rows(key: str, n: int, expert: bool) -> dict[str, list[Any]]:
        actions = [[float(rng.uniform(0, 2)), float(rng.uniform(-0.2, 0.2))] for _ in range(n)]
        return {
            "rollout": [key] * n,
            "step": list(range(n)),
            "time_s": [0.1 * i for i in range(n)],
            "features": rng.normal(size=(n, 2)).round(4).tolist(),
            "control": ["expert" if expert else "learner"] * n,
            "learner_action": [None] * n if expert else actions,
            "expert_action": actions if expert else [None] * n,
        }

    upload(client, uploader, slug, 0, rows("c-demo", 4, True))
    upload(client, uploader, slug, 1, rows("c-run", 6, False))
    return slug


def read_parquet(content: bytes) -> pa.Table:
    return pq.read_table(io.BytesIO(content))
