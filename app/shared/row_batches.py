"""Training-set rows a batch at a time, and the merges that keep them in step-id order.

Exports and content hashes walk a training set once, in step-id order, a bounded batch at a time.
Rows come from two sorted streams (expert-driven steps, and relabelled states) that are merged
here; an incremental export is a merge-join of two versions' streams. Nothing here touches the
store, so memory is bounded by the batch sizes of the streams fed in.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field, replace

import numpy as np

SOURCE_DEMONSTRATION = "demonstration"
SOURCE_TAKEOVER = "takeover"
SOURCE_RELABEL = "relabel"
# a row's source is stored as its index here
SOURCES = (SOURCE_DEMONSTRATION, SOURCE_TAKEOVER, SOURCE_RELABEL)


@dataclass
class RowBatch:
    """Rows of a training set, sorted by step id (arrays share the first axis, n rows).

    Attributes
    ----------
    step_id : ndarray of int64, shape (n,)
    source : ndarray of int8, shape (n,)
        Index into ``SOURCES``.
    action : ndarray of int64, shape (n,), or of float32, shape (n, n_dims)
        The expert's (or the consensus) action: an index into the discrete action list, or a
        continuous action vector.
    label_count : ndarray of int64, shape (n,)
        Answers behind the action (1 for an expert-driven step).
    agreement : ndarray of float64, shape (n,)
        Consensus agreement (1.0 for an expert-driven step).
    round : ndarray of int64, shape (n,)
        Round number of the step.
    rollout_id : ndarray of int64, shape (n,)
        Store id of the step's rollout; ``rollout_keys`` names it.
    step_index : ndarray of int64, shape (n,)
        Index of the step within its rollout.
    features : ndarray of float32, shape (n, n_features), or None
        The state vectors, when the stream was asked for them.
    rollout_keys : dict of int to str
        Key of every rollout id that occurs in the batch.
    learner_versions : dict of int to str or None
        Learner version of every round number of the loop.
    """

    step_id: np.ndarray
    source: np.ndarray
    action: np.ndarray
    label_count: np.ndarray
    agreement: np.ndarray
    round: np.ndarray
    rollout_id: np.ndarray
    step_index: np.ndarray
    features: np.ndarray | None
    rollout_keys: dict[int, str] = field(default_factory=dict)
    learner_versions: dict[int, str | None] = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.step_id)

    def take(self, index: np.ndarray | slice) -> RowBatch:
        """The rows at `index` (int array, boolean mask or slice), keeping the name tables."""
        return replace(
            self,
            **{name: getattr(self, name)[index] for name in _ROW_ARRAYS},
            features=None if self.features is None else self.features[index],
        )

    def rollout(self) -> np.ndarray:
        """Rollout key of each row, ndarray of object (str), shape (n,)."""
        unique, inverse = np.unique(self.rollout_id, return_inverse=True)
        keys = np.array([self.rollout_keys[int(i)] for i in unique], dtype=object)
        return keys[inverse] if len(unique) else np.empty(0, dtype=object)

    def learner_version(self) -> np.ndarray:
        """Learner version of each row's round, ndarray of object (str or None), shape (n,)."""
        unique, inverse = np.unique(self.round, return_inverse=True)
        names = np.array([self.learner_versions.get(int(r)) for r in unique], dtype=object)
        return names[inverse] if len(unique) else np.empty(0, dtype=object)


_ROW_ARRAYS = (
    "step_id",
    "source",
    "action",
    "label_count",
    "agreement",
    "round",
    "rollout_id",
    "step_index",
)


def concat(batches: list[RowBatch]) -> RowBatch:
    """One batch holding the rows of `batches` in the order given (not re-sorted)."""
    if len(batches) == 1:
        return batches[0]
    first = batches[0]
    keys: dict[int, str] = {}
    for batch in batches:
        keys.update(batch.rollout_keys)
    with_features = first.features is not None
    return RowBatch(
        **{name: np.concatenate([getattr(b, name) for b in batches]) for name in _ROW_ARRAYS},
        features=np.concatenate([b.features for b in batches if b.features is not None])
        if with_features
        else None,
        rollout_keys=keys,
        learner_versions=first.learner_versions,
    )


def _sorted_union(parts: list[RowBatch]) -> RowBatch:
    """The rows of sorted parts in step-id order, copying only when they interleave."""
    filled = [p for p in parts if len(p)]
    if len(filled) <= 1:
        return filled[0] if filled else parts[0]
    filled.sort(key=lambda p: int(p.step_id[0]))
    joined = concat(filled)
    if all(a.step_id[-1] < b.step_id[0] for a, b in zip(filled, filled[1:], strict=False)):
        return joined
    return joined.take(np.argsort(joined.step_id, kind="stable"))


def merge_sorted(first: Iterable[RowBatch], second: Iterable[RowBatch]) -> Iterator[RowBatch]:
    """Merge two streams of batches, each sorted by step id, into one sorted stream.

    Each output batch holds the rows of both buffers up to the smaller of their last step ids,
    so at most one input batch per stream is held at a time.
    """
    streams = [iter(first), iter(second)]
    buffers: list[RowBatch | None] = [None, None]
    finished = [False, False]
    while True:
        for side in (0, 1):
            while not finished[side] and not _has_rows(buffers[side]):
                try:
                    buffers[side] = next(streams[side])
                except StopIteration:
                    finished[side] = True
        live = [b for b in buffers if b is not None and len(b)]
        if not live:
            return
        if len(live) == 1:
            yield live[0]
            buffers = [None, None]
            continue
        a, b = live
        bound = min(a.step_id[-1], b.step_id[-1])
        parts, rest = [], []
        for buffer in (a, b):
            cut = int(np.searchsorted(buffer.step_id, bound, side="right"))
            parts.append(buffer.take(slice(0, cut)))
            rest.append(buffer.take(slice(cut, None)))
        buffers = [rest[0], rest[1]]
        yield _sorted_union(parts)


def rows_not_in(newer: Iterable[RowBatch], older: Iterable[RowBatch]) -> Iterator[RowBatch]:
    """Rows of `newer` with no identical row in `older` (both streams sorted by step id).

    A row's step id fixes its state, round, rollout, step and source (steps never change), so
    two rows are identical when step id, action, label count and agreement agree. A relabelled
    state whose consensus changed between the versions is therefore returned too.
    """
    pending = iter(older)
    buffer: RowBatch | None = None
    exhausted = False
    for batch in newer:
        if not len(batch):
            continue
        high = batch.step_id[-1]
        parts = [] if buffer is None else [buffer]
        # read the older stream up to this batch's last step id
        while not exhausted and not _reaches(parts, high):
            try:
                parts.append(next(pending))
            except StopIteration:
                exhausted = True
        window = concat(parts) if parts else None
        if window is None or not len(window):
            buffer = None
            yield batch
            continue
        cut = int(np.searchsorted(window.step_id, high, side="right"))
        buffer = window.take(slice(cut, None))
        seen = window.take(slice(0, cut))
        yield batch.take(~_identical_in(batch, seen))


def _has_rows(batch: RowBatch | None) -> bool:
    return batch is not None and len(batch) > 0


def _reaches(parts: list[RowBatch], high: int) -> bool:
    """Whether the rows read so far go up to step id `high`."""
    for part in reversed(parts):
        if len(part):
            return bool(part.step_id[-1] >= high)
    return False


def _identical_in(batch: RowBatch, seen: RowBatch) -> np.ndarray:
    """Mask of shape (n,): rows of `batch` that have an identical row in `seen`."""
    if not len(seen):
        return np.zeros(len(batch), dtype=bool)
    at = np.minimum(np.searchsorted(seen.step_id, batch.step_id), len(seen) - 1)
    same = seen.step_id[at] == batch.step_id
    same &= seen.label_count[at] == batch.label_count
    same &= seen.agreement[at] == batch.agreement
    actions_equal = seen.action[at] == batch.action
    same &= actions_equal if actions_equal.ndim == 1 else actions_equal.all(axis=1)
    return same
