"""Reading training-set rows from the store a page at a time, as RowBatch streams.

Export speed is bounded by how fast rows leave the database driver, so the hot query (expert-
driven steps, nearly every row of a typical set) runs on the driver's own cursor and is read a
page at a time: one query per round, ``round_id = ? ... ORDER BY id``, which walks the
(round_id, id) index without sorting. Per-round streams are merged by step id.
"""

from __future__ import annotations

import itertools
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from functools import reduce
from typing import Any, Protocol

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from ..ingest.models import CONTROL_EXPERT, Rollout, Step
from ..loops.models import Round
from .encode import FLOAT32_LE
from .row_batches import SOURCES, RowBatch, merge_sorted


class LoopShape(Protocol):
    """What the training set needs of a loop's spec: its row widths and, for a continuous
    action space, the tolerance of a vote. The loop's `LoopSpec` (app/loops/spec.py) is one;
    this stage sits below app/loops, so it names the parts instead of importing the type."""

    @property
    def n_features(self) -> int: ...

    @property
    def is_discrete(self) -> bool: ...

    @property
    def action_width(self) -> int: ...

    @property
    def tolerance(self) -> np.ndarray: ...


@dataclass(frozen=True)
class RoundTable:
    """A loop's rounds: ids (sorted), numbers and learner versions."""

    ids: np.ndarray
    numbers: np.ndarray
    learner_versions: dict[int, str | None]

    @classmethod
    def of(cls, session: Session, loop_id: int) -> RoundTable:
        rows = session.execute(
            select(Round.id, Round.number, Round.learner_version)
            .where(Round.loop_id == loop_id)
            .order_by(Round.id)
        ).all()
        return cls(
            ids=np.array([r[0] for r in rows], dtype=np.int64),
            numbers=np.array([r[1] for r in rows], dtype=np.int64),
            learner_versions={int(r[1]): r[2] for r in rows},
        )

    def number_of(self, round_ids: np.ndarray) -> np.ndarray:
        return self.numbers[np.searchsorted(self.ids, round_ids)]


_cursor_names = itertools.count(1)


@contextmanager
def _driver_cursor(session: Session) -> Iterator[Any]:
    """A cursor of the database driver itself that reads rows as they are fetched: a named
    (server-side, binary) cursor on PostgreSQL, a plain one on SQLite (which steps lazily)."""
    connection = session.connection()
    raw = connection.connection
    if connection.dialect.name == "postgresql":
        cursor = raw.cursor(name=f"training_rows_{next(_cursor_names)}", binary=True)
    else:
        cursor = raw.cursor()
    try:
        yield cursor
    finally:
        cursor.close()


def _driver_sql(session: Session, sql: str, params: dict[str, Any]) -> str:
    """SQL written with :name parameters, in the driver's own parameter style."""
    if session.connection().dialect.name == "postgresql":
        for name in params:
            sql = sql.replace(f":{name}", f"%({name})s")
    return sql


def _rollout_keys(session: Session, rollout_id: np.ndarray) -> dict[int, str]:
    wanted = np.unique(rollout_id).tolist()
    rows = session.execute(select(Rollout.id, Rollout.key).where(Rollout.id.in_(wanted))).all()
    return {int(r[0]): r[1] for r in rows}


def _ints(rows: list[tuple[Any, ...]], at: int) -> np.ndarray:
    # fromiter over one field runs about twice as fast as transposing the rows with zip
    return np.fromiter((row[at] for row in rows), dtype=np.int64, count=len(rows))


def _vectors(rows: list[tuple[Any, ...]], at: int, width: int) -> np.ndarray:
    blob = b"".join([row[at] for row in rows])
    return np.frombuffer(blob, dtype=FLOAT32_LE).reshape(len(rows), width)


def expert_batches(
    session: Session,
    *,
    shape: LoopShape,
    rounds: RoundTable,
    up_to_round: int,
    max_step_id: int,
    batch: int,
    with_features: bool,
) -> Iterator[RowBatch]:
    """Expert-driven steps of rounds up to `up_to_round` with ids up to `max_step_id`, in
    step-id order: demonstrations (round 0) and takeovers (later rounds)."""
    streams = [
        _expert_round(
            session, shape, rounds, int(rid), int(number), max_step_id, batch, with_features
        )
        for rid, number in zip(rounds.ids.tolist(), rounds.numbers.tolist(), strict=True)
        if number <= up_to_round
    ]
    if not streams:
        return iter(())
    return reduce(merge_sorted, streams)


def _expert_round(
    session: Session,
    shape: LoopShape,
    rounds: RoundTable,
    round_id: int,
    number: int,
    max_step_id: int,
    batch: int,
    with_features: bool,
) -> Iterator[RowBatch]:
    action = "expert_action" if shape.is_discrete else "expert_action_vec"
    features = ", features" if with_features else ""
    sql = (
        f"SELECT id, rollout_id, step_index, {action}{features} FROM steps "
        "WHERE round_id = :round_id AND control = :control AND id <= :last ORDER BY id"
    )
    params = {"round_id": round_id, "control": CONTROL_EXPERT, "last": max_step_id}
    source = SOURCES.index("demonstration" if number == 0 else "takeover")
    with _driver_cursor(session) as cursor:
        cursor.execute(_driver_sql(session, sql, params), params)
        while page := _expert_page(session, cursor.fetchmany(batch), shape, rounds, number, source):
            # the driver's row tuples are gone by now: a suspended stream holds only arrays
            yield page


def _expert_page(
    session: Session,
    rows: list[tuple[Any, ...]],
    shape: LoopShape,
    rounds: RoundTable,
    number: int,
    source: int,
) -> RowBatch | None:
    """A RowBatch from rows (id, rollout_id, step_index, action[, features])."""
    if not rows:
        return None
    n = len(rows)
    rollout_id = _ints(rows, 1)
    return RowBatch(
        step_id=_ints(rows, 0),
        source=np.full(n, source, np.int8),
        action=_ints(rows, 3) if shape.is_discrete else _vectors(rows, 3, shape.action_width),
        label_count=np.ones(n, np.int64),
        agreement=np.ones(n, np.float64),
        round=np.full(n, number, np.int64),
        rollout_id=rollout_id,
        step_index=_ints(rows, 2),
        features=_vectors(rows, 4, shape.n_features) if len(rows[0]) > 4 else None,
        rollout_keys=_rollout_keys(session, rollout_id),
        learner_versions=rounds.learner_versions,
    )


def relabel_batches(
    session: Session,
    *,
    shape: LoopShape,
    rounds: RoundTable,
    step_ids: np.ndarray,
    action: np.ndarray,
    label_count: np.ndarray,
    agreement: np.ndarray,
    batch: int,
    with_features: bool,
) -> Iterator[RowBatch]:
    """Learner-driven steps with a resolved consensus (sorted `step_ids` and their consensus
    arrays), `batch` ids at a time.

    Labels on an expert-driven step cannot arise (such steps are never queued); if one did, the
    expert's own action wins and the step is read only by the expert stream.
    """
    dtype = np.int64 if shape.is_discrete else np.float32
    relabel = SOURCES.index("relabel")
    columns_wanted: list[Any] = [Step.id, Step.rollout_id, Step.round_id, Step.step_index]
    if with_features:
        columns_wanted.append(Step.features)
    for start in range(0, len(step_ids), batch):
        chunk = step_ids[start : start + batch]
        rows: list[Any] = list(
            session.execute(
                select(*columns_wanted)
                .where(Step.id.in_(chunk.tolist()), Step.control != CONTROL_EXPERT)
                .order_by(Step.id)
            )
        )
        if not rows:
            continue
        ids = _ints(rows, 0)
        at = start + np.searchsorted(chunk, ids)
        rollout_id = _ints(rows, 1)
        yield RowBatch(
            step_id=ids,
            source=np.full(len(ids), relabel, np.int8),
            action=action[at].astype(dtype),
            label_count=label_count[at].astype(np.int64),
            agreement=agreement[at].astype(np.float64),
            round=rounds.number_of(_ints(rows, 2)),
            rollout_id=rollout_id,
            step_index=_ints(rows, 3),
            features=_vectors(rows, 4, shape.n_features) if with_features else None,
            rollout_keys=_rollout_keys(session, rollout_id),
            learner_versions=rounds.learner_versions,
        )
