"""Reading training-set rows from the store a page at a time, as RowBatch streams.

Export speed is bounded by how fast rows leave the database, so pages are read as Arrow columns
by the database's ADBC driver (app.shared.bulk_reads), not row by row through a Python driver.
The hot query (expert-driven steps, nearly every row of a typical set) runs per round and pages
by key: ``round_id = ? AND id > <last id read> ORDER BY id LIMIT <page>``, which walks the
(round_id, id) index without sorting. Per-round streams are merged by step id; each page is read
whole, so the streams take turns on one connection.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from functools import reduce
from typing import Protocol

import numpy as np
from sqlalchemy import bindparam, select
from sqlalchemy.orm import Session

from ..ingest.models import CONTROL_EXPERT, Rollout
from ..loops.models import Round
from .bulk_reads import BulkReader, int_list
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
            ids=np.array([r.id for r in rows], dtype=np.int64),
            numbers=np.array([r.number for r in rows], dtype=np.int64),
            learner_versions={int(r.number): r.learner_version for r in rows},
        )

    def number_of(self, round_ids: np.ndarray) -> np.ndarray:
        return self.numbers[np.searchsorted(self.ids, round_ids)]


# rollout keys read from the store at a time, from the first id a page of steps needs
ROLLOUT_KEY_RANGE = 1024


class RolloutKeys:
    """Keys of rollouts by id during one pass over the steps, read a range of ids at a time.

    Steps read in id order belong to rollouts stored in nearly the same order, so when a page
    needs a key not known yet, the keys of the next `span` rollouts by id (default
    `ROLLOUT_KEY_RANGE`) are read together: a pass asks the store about once per `span`
    rollouts instead of once per page (on PostgreSQL each ask is a round trip). Ids outside
    that range (rollouts stored out of order, relabelled states spread over many rollouts) are
    read by id. Only the last range is kept, so memory does not grow with the rollouts.
    """

    def __init__(self, session: Session, span: int | None = None) -> None:
        self._session = session
        self._range = (
            select(Rollout.id, Rollout.key)
            .where(Rollout.id >= bindparam("low"))
            .order_by(Rollout.id)
            .limit(ROLLOUT_KEY_RANGE if span is None else span)
        )
        self._known: dict[int, str] = {}

    def of(self, rollout_id: np.ndarray) -> dict[int, str]:
        """The key of every distinct id in `rollout_id` (ids of no rollout are left out)."""
        wanted = np.unique(rollout_id).tolist()
        found = {i: self._known[i] for i in wanted if i in self._known}
        if len(found) == len(wanted):
            return found
        missing = [i for i in wanted if i not in found]
        connection = self._session.connection()
        ranged = connection.execute(self._range, {"low": missing[0]})
        self._known = {int(i): key for i, key in ranged}
        found.update((i, self._known[i]) for i in missing if i in self._known)
        elsewhere = [i for i in missing if i not in self._known]
        if elsewhere:
            by_id = select(Rollout.id, Rollout.key).where(Rollout.id.in_(elsewhere))
            found.update((int(i), key) for i, key in connection.execute(by_id))
        return found


def _in_id_order(page: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The page's columns sorted by "id" (SQLite does not promise an aggregate's row order)."""
    ids = page["id"]
    if len(ids) < 2 or bool(np.all(ids[1:] > ids[:-1])):
        return page
    order = np.argsort(ids, kind="stable")
    return {name: values[order] for name, values in page.items()}


def expert_batches(
    reader: BulkReader,
    *,
    keys: RolloutKeys,
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
            reader, keys, shape, rounds, int(rid), int(number), max_step_id, batch, with_features
        )
        for rid, number in zip(rounds.ids.tolist(), rounds.numbers.tolist(), strict=True)
        if number <= up_to_round
    ]
    if not streams:
        return iter(())
    return reduce(merge_sorted, streams)


def _expert_round(
    reader: BulkReader,
    keys: RolloutKeys,
    shape: LoopShape,
    rounds: RoundTable,
    round_id: int,
    number: int,
    max_step_id: int,
    batch: int,
    with_features: bool,
) -> Iterator[RowBatch]:
    action = "expert_action" if shape.is_discrete else "expert_action_vec"
    columns: dict[str, int | None] = {
        "id": None,
        "rollout_id": None,
        "step_index": None,
        "action": None if shape.is_discrete else shape.action_width,
    }
    if with_features:
        columns["features"] = shape.n_features
    source = SOURCES.index("demonstration" if number == 0 else "takeover")
    after = 0
    while True:
        page = _in_id_order(
            reader.page(
                f"SELECT {_select_list(columns, action=action)} FROM steps "
                f"WHERE round_id = {int(round_id)} AND control = {int(CONTROL_EXPERT)} "
                f"AND id > {int(after)} AND id <= {int(max_step_id)} "
                f"ORDER BY id LIMIT {int(batch)}",
                columns,
            )
        )
        n = len(page["id"])
        if not n:
            return
        yield RowBatch(
            step_id=page["id"],
            source=np.full(n, source, np.int8),
            action=page["action"],
            label_count=np.ones(n, np.int64),
            agreement=np.ones(n, np.float64),
            round=np.full(n, number, np.int64),
            rollout_id=page["rollout_id"],
            step_index=page["step_index"],
            features=page.get("features"),
            rollout_keys=keys.of(page["rollout_id"]),
            learner_versions=rounds.learner_versions,
        )
        if n < batch:
            return
        after = int(page["id"][-1])


def _select_list(columns: dict[str, int | None], *, action: str) -> str:
    """The SELECT list of `columns`, the action read from its stored column `action`."""
    return ", ".join(f"{action} AS action" if name == "action" else name for name in columns)


def relabel_batches(
    reader: BulkReader,
    *,
    keys: RolloutKeys,
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
    columns: dict[str, int | None] = {
        "id": None,
        "rollout_id": None,
        "round_id": None,
        "step_index": None,
    }
    if with_features:
        columns["features"] = shape.n_features
    for start in range(0, len(step_ids), batch):
        chunk = step_ids[start : start + batch]
        page = _in_id_order(
            reader.page(
                f"SELECT {', '.join(columns)} FROM steps "
                f"WHERE id IN ({int_list(chunk.tolist())}) "
                f"AND control != {int(CONTROL_EXPERT)} ORDER BY id",
                columns,
            )
        )
        ids = page["id"]
        if not len(ids):
            continue
        at = start + np.searchsorted(chunk, ids)
        yield RowBatch(
            step_id=ids,
            source=np.full(len(ids), relabel, np.int8),
            action=action[at].astype(dtype),
            label_count=label_count[at].astype(np.int64),
            agreement=agreement[at].astype(np.float64),
            round=rounds.number_of(page["round_id"]),
            rollout_id=page["rollout_id"],
            step_index=page["step_index"],
            features=page.get("features"),
            rollout_keys=keys.of(page["rollout_id"]),
            learner_versions=rounds.learner_versions,
        )
