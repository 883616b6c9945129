"""An invented discrete round with known ground truth, built through tests/reports/builders.py.

The test keeps its own record of every feature, action and label it writes, so expected
report values are computed from that record with reference libraries, never read back from
the code under test.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

import numpy as np

from tests.helpers import DISCRETE_SPEC
from tests.reports import builders

ACTIONS = DISCRETE_SPEC["action_space"]["actions"]
ANNOTATORS = ("ann-a", "ann-b", "ann-c")
SECONDS_APART = {"ann-a": 20.0, "ann-b": 30.0, "ann-c": 45.0}
BREAK_AFTER = 50  # ann-a takes a 20-minute break after this many labels


@dataclass
class Vote:
    step: int
    annotator: str
    action: int  # -1: unsure
    at: datetime | None = None


@dataclass
class DiscreteWorld:
    slug: str
    demo_features: np.ndarray  # (n_demo_states, n_features)
    round_features: np.ndarray  # (n_round_states, n_features)
    learner: dict[int, int]  # step id -> learner action
    previous: dict[int, int]  # step id -> learner action one step before (-1: first step)
    audit: list[int]
    ranked: list[int]
    shown: set[int]
    votes: list[Vote] = field(default_factory=list)
    users: dict[str, int] = field(default_factory=dict)

    def consensus(self) -> dict[int, int]:
        """Majority vote per step over real votes; ties and all-unsure left out."""
        tally: dict[int, Counter[int]] = {}
        for v in self.votes:
            if v.action >= 0:
                tally.setdefault(v.step, Counter())[v.action] += 1
        out = {}
        for step, counts in tally.items():
            top = counts.most_common()
            if len(top) == 1 or top[0][1] > top[1][1]:
                out[step] = top[0][0]
        return out


def build_discrete(
    app: Any,
    client: Any,
    admin: dict[str, str],
    uploader: dict[str, str],
    make_user: Any,
    *,
    mode: str,
    n_audit: int = 120,
    n_ranked: int = 40,
    title: str | None = None,
    seed: int = 11,
) -> DiscreteWorld:
    """mode "two": ann-a and ann-b vote on every selected state (ann-c labels one other state
    alone); "three": all three vote on every selected state; "varied": 1-3 annotators per
    state, with some unsure answers."""
    rng = np.random.default_rng(seed)
    spec = dict(DISCRETE_SPEC, title=title or DISCRETE_SPEC["title"])
    slug = builders.create_loop(client, admin, spec)
    builders.open_round(client, admin, slug, "v1")
    for name in ANNOTATORS:
        make_user("annotator", name=name)
    demo_features = rng.normal(size=(6, 10, 3)).astype(np.float32)
    demo_actions = rng.integers(0, 3, size=(6, 10))
    keys0 = builders.upload_round(
        client, uploader, slug=slug, number=0, features=demo_features,
        actions=demo_actions, action_names=ACTIONS, prefix="demo",
    )  # fmt: skip
    shift = np.array([1.5, 0.0, 0.0], dtype=np.float32)
    features = (rng.normal(size=(20, 10, 3)) + shift).astype(np.float32)
    learner = np.zeros((20, 10), dtype=np.int64)
    learner[:, 0] = rng.integers(0, 3, size=20)
    for s in range(1, 10):  # the learner often repeats itself, as real policies do
        repeat = rng.random(20) < 0.6
        learner[:, s] = np.where(repeat, learner[:, s - 1], rng.integers(0, 3, size=20))
    keys1 = builders.upload_round(
        client, uploader, slug=slug, number=1, features=features, actions=learner,
        action_names=ACTIONS, prefix="run",
    )  # fmt: skip
    builders.step_ids(app, slug, keys0, 10)
    grid = builders.step_ids(app, slug, keys1, 10)
    flat = grid.reshape(-1)
    order = rng.permutation(len(flat))
    audit = [int(s) for s in flat[order[:n_audit]]]
    ranked = [int(s) for s in flat[order[n_audit : n_audit + n_ranked]]]
    world = DiscreteWorld(
        slug=slug,
        demo_features=demo_features.reshape(-1, 3).astype(np.float64),
        round_features=features.reshape(-1, 3).astype(np.float64),
        learner={int(grid[r, s]): int(learner[r, s]) for r in range(20) for s in range(10)},
        previous={
            int(grid[r, s]): int(learner[r, s - 1]) if s > 0 else -1
            for r in range(20)
            for s in range(10)
        },
        audit=audit,
        ranked=ranked,
        shown={s for i, s in enumerate(audit + ranked) if i % 3 == 0},
        users=builders.user_ids(app, list(ANNOTATORS)),
    )
    for step in audit + ranked:
        truth = world.learner[step] if rng.random() < 0.65 else int(rng.integers(0, 3))
        if mode == "two":
            who = ["ann-a", "ann-b"]
        elif mode == "three":
            who = list(ANNOTATORS)
        else:
            who = list(rng.choice(ANNOTATORS, size=int(rng.integers(1, 4)), replace=False))
        for name in who:
            action = truth if rng.random() < 0.85 else int(rng.integers(0, 3))
            if mode == "varied" and rng.random() < 0.05:
                action = -1
            world.votes.append(Vote(step, str(name), action))
    if mode == "two":  # a single label on an unselected state: not part of any agreement
        spare = int(flat[order[n_audit + n_ranked]])
        world.votes.append(Vote(spare, "ann-c", 1))
    _stamp(world.votes)
    builders.add_selection_and_labels(
        app,
        slug=slug,
        number=1,
        audit=audit,
        ranked=ranked,
        shown=world.shown,
        labels=[
            builders.LabelSpec(
                step_id=v.step,
                user_id=world.users[v.annotator],
                action=None if v.action < 0 else v.action,
                unsure=v.action < 0,
                at=v.at or builders.T0,
            )
            for v in world.votes
        ],
    )
    return world


def _stamp(votes: list[Vote]) -> None:
    """Give each annotator's labels evenly spaced times, with one long break for ann-a."""
    done: Counter[str] = Counter()
    for v in votes:
        n = done[v.annotator]
        pause = (
            timedelta(minutes=20) if v.annotator == "ann-a" and n >= BREAK_AFTER else timedelta()
        )
        v.at = builders.T0 + timedelta(seconds=SECONDS_APART[v.annotator] * n) + pause
        done[v.annotator] += 1
