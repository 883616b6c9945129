"""loop settings: the ranking gap in recorded steps (min_gap_steps) instead of seconds

Revision ID: 0006
Revises: 0009

Data only. Each loop's ``min_gap_s`` becomes ``min_gap_steps``:

- the old default, 1.0 s, becomes the new default (10 steps): nobody chose it, and at 50 Hz it
  blocked 50 steps around every pick and left budgets unspent;
- any other value is converted with the loop's own control rate, the median time between
  consecutive recorded steps of its rollouts: ``round(min_gap_s / median interval)``, at least
  1 step when the gap was positive; a loop without rollouts is taken to run at 10 Hz.

Queued or running ranking jobs get the same conversion of their recorded parameters. Downgrade
converts back with the same rate.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from typing import Any

import numpy as np
import sqlalchemy as sa
from alembic import op

revision: str = "0006"
down_revision: str | None = "0009"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

OLD_DEFAULT_S = 1.0
NEW_DEFAULT_STEPS = 10
FALLBACK_INTERVAL_S = 0.1
RATE_SAMPLE_STEPS = 20_000

loops = sa.table("loops", sa.column("id", sa.Integer), sa.column("settings", sa.JSON))
jobs = sa.table(
    "jobs",
    sa.column("id", sa.Integer),
    sa.column("kind", sa.String),
    sa.column("status", sa.String),
    sa.column("loop_id", sa.Integer),
    sa.column("params", sa.JSON),
)
rollouts = sa.table("rollouts", sa.column("id", sa.Integer), sa.column("loop_id", sa.Integer))
steps = sa.table(
    "steps",
    sa.column("id", sa.Integer),
    sa.column("rollout_id", sa.Integer),
    sa.column("step_index", sa.Integer),
    sa.column("time_s", sa.Float),
)


def _as_dict(value: Any) -> dict[str, Any]:
    return dict(json.loads(value) if isinstance(value, str) else value)


def step_interval(conn: sa.Connection, loop_id: int) -> float:
    """Median seconds between consecutive recorded steps of a loop's (first) rollouts."""
    rows = conn.execute(
        sa.select(steps.c.rollout_id, steps.c.time_s)
        .join(rollouts, rollouts.c.id == steps.c.rollout_id)
        .where(rollouts.c.loop_id == loop_id)
        .order_by(steps.c.rollout_id, steps.c.step_index)
        .limit(RATE_SAMPLE_STEPS)
    ).all()
    if len(rows) < 2:
        return FALLBACK_INTERVAL_S
    rollout = np.array([r[0] for r in rows])
    time_s = np.array([r[1] for r in rows], dtype=np.float64)
    same = rollout[1:] == rollout[:-1]
    gaps = np.diff(time_s)[same]
    gaps = gaps[gaps > 0]
    return float(np.median(gaps)) if gaps.size else FALLBACK_INTERVAL_S


def to_steps(min_gap_s: float, interval_s: float) -> int:
    if min_gap_s == OLD_DEFAULT_S:
        return NEW_DEFAULT_STEPS
    if min_gap_s <= 0:
        return 0
    return max(1, int(round(min_gap_s / interval_s)))


def _convert(values: dict[str, Any], interval_s: float) -> dict[str, Any]:
    out = {k: v for k, v in values.items() if k not in ("min_gap_s", "discrete_method")}
    if "min_gap_s" in values:
        out["min_gap_steps"] = to_steps(float(values["min_gap_s"]), interval_s)
    return out


# settings and job parameters that came with this revision; the code before it refuses them
NEW_KEYS = (
    "min_gap_steps",
    "uncertainty_method",
    "self_tuning",
    "tuning_min_disagreements",
    "training_max_step_id",
    "training_max_label_id",
)


def _revert(values: dict[str, Any], interval_s: float) -> dict[str, Any]:
    out = {k: v for k, v in values.items() if k not in NEW_KEYS}
    if "min_gap_steps" in values:
        gap = int(values["min_gap_steps"])
        out["min_gap_s"] = OLD_DEFAULT_S if gap == NEW_DEFAULT_STEPS else gap * interval_s
    return out


def _rewrite(change: Any, key: str) -> None:
    conn = op.get_bind()
    intervals: dict[int, float] = {}

    def interval(loop_id: int) -> float:
        if loop_id not in intervals:
            intervals[loop_id] = step_interval(conn, loop_id)
        return intervals[loop_id]

    for loop_id, settings in conn.execute(sa.select(loops.c.id, loops.c.settings)).all():
        values = _as_dict(settings)
        if key in values:
            conn.execute(
                loops.update()
                .where(loops.c.id == loop_id)
                .values(settings=change(values, interval(loop_id)))
            )
    live = conn.execute(
        sa.select(jobs.c.id, jobs.c.loop_id, jobs.c.params).where(
            jobs.c.kind == "rank", jobs.c.status.in_(("queued", "running"))
        )
    ).all()
    for job_id, loop_id, params in live:
        values = _as_dict(params)
        if key in values and loop_id is not None:
            conn.execute(
                jobs.update()
                .where(jobs.c.id == job_id)
                .values(params=change(values, interval(loop_id)))
            )


def upgrade() -> None:
    _rewrite(_convert, "min_gap_s")


def downgrade() -> None:
    _rewrite(_revert, "min_gap_steps")
