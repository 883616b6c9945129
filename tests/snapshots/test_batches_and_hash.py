"""Pure parts of snapshots: merging sorted row streams, incremental differences, content hash.

Each fast path is compared with a slow, obvious reference on seeded data (Python sets and
sorted(); the struct-by-struct hash in tests/snapshots/reference.py), plus invariance checks:
splitting the same rows into other batches changes nothing.
"""

from __future__ import annotations

from collections import Counter
from typing import Any

import numpy as np
import pytest

from expertloop.shared.row_batches import RowBatch, concat, merge_sorted, rows_not_in
from expertloop.snapshots.content_hash import ContentHasher
from expertloop.snapshots.service import _Tally
from tests.snapshots.reference import SOURCE_CODES, as_tuples, reference_hash

SOURCES = list(SOURCE_CODES)
VERSIONS = {0: "demonstrations", 1: "pol-1", 2: None}


def random_rows(rng: np.random.Generator, step_ids: np.ndarray, n_features: int = 3) -> list[dict]:
    """Rows in step-id order; rollouts come in runs, so runs cross batch boundaries."""
    rows = []
    rollout = 0
    for sid in sorted(step_ids.tolist()):
        if rng.random() < 0.2:
            rollout += 1
        rows.append(
            {
                "step_id": sid,
                "features": rng.normal(size=n_features).astype(np.float32).tolist(),
                "expert_action": int(rng.integers(0, 3)),
                "round": int(rng.integers(0, 3)),
                "source": SOURCES[int(rng.integers(0, 3))],
                "rollout": f"roll-{rollout}-ü",
                "step": int(rng.integers(0, 50)),
                "label_count": int(rng.integers(1, 4)),
                "agreement": float(rng.choice([1.0, 2 / 3, 0.5])),
            }
        )
        rows[-1]["learner_version"] = VERSIONS[rows[-1]["round"]]
    return rows


def to_batch(rows: list[dict], with_features: bool = True) -> RowBatch:
    # one id per key, the same in every batch, as rollout ids are in the store
    ids = {
        k: 100 + int(k.split("-")[1]) if k.startswith("roll-") else 99
        for k in {r["rollout"] for r in rows}
    }
    return RowBatch(
        step_id=np.array([r["step_id"] for r in rows], dtype=np.int64),
        source=np.array([SOURCE_CODES[r["source"]] for r in rows], dtype=np.int8),
        action=np.array([r["expert_action"] for r in rows], dtype=np.int64),
        label_count=np.array([r["label_count"] for r in rows], dtype=np.int64),
        agreement=np.array([r["agreement"] for r in rows], dtype=np.float64),
        round=np.array([r["round"] for r in rows], dtype=np.int64),
        rollout_id=np.array([ids[r["rollout"]] for r in rows], dtype=np.int64),
        step_index=np.array([r["step"] for r in rows], dtype=np.int64),
        features=np.array([r["features"] for r in rows], dtype=np.float32).reshape(len(rows), -1)
        if with_features
        else None,
        rollout_keys={i: k for k, i in ids.items()},
        learner_versions=dict(VERSIONS),
    )


def split(batch: RowBatch, rng: np.random.Generator, max_size: int) -> list[RowBatch]:
    """The batch cut at random places into pieces of 1..max_size rows."""
    pieces, start = [], 0
    while start < len(batch):
        size = int(rng.integers(1, max_size + 1))
        pieces.append(batch.take(slice(start, start + size)))
        start += size
    return pieces


def to_dicts(batch: RowBatch) -> list[dict[str, Any]]:
    rollouts, versions = batch.rollout().tolist(), batch.learner_version().tolist()
    assert batch.features is not None
    return [
        {
            "step_id": int(batch.step_id[i]),
            "features": batch.features[i].tolist(),
            "expert_action": int(batch.action[i]),
            "round": int(batch.round[i]),
            "source": SOURCES[int(batch.source[i])],
            "learner_version": versions[i],
            "rollout": rollouts[i],
            "step": int(batch.step_index[i]),
            "label_count": int(batch.label_count[i]),
            "agreement": float(batch.agreement[i]),
        }
        for i in range(len(batch))
    ]


def _hash(pieces: list[RowBatch]) -> str:
    hasher = ContentHasher(n_features=3, discrete=True, action_width=3)
    for piece in pieces:
        hasher.update(piece)
    return hasher.hexdigest()


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_merge_sorted_equals_sorted_union(seed):
    rng = np.random.default_rng(seed)
    ids = rng.choice(np.arange(1, 5000), size=600, replace=False)
    first, second = np.sort(ids[:450]), np.sort(ids[450:])
    rows_a, rows_b = random_rows(rng, first), random_rows(rng, second)
    merged = list(merge_sorted(split(to_batch(rows_a), rng, 40), split(to_batch(rows_b), rng, 25)))
    # reference: Python's sorted() over both lists of rows
    expected = sorted(rows_a + rows_b, key=lambda r: r["step_id"])
    got = [row for batch in merged for row in to_dicts(batch)]
    assert got == expected
    assert all(len(b) <= 40 + 25 for b in merged)
    assert all(np.all(np.diff(b.step_id) > 0) for b in merged)


def test_merge_sorted_with_an_empty_side():
    rng = np.random.default_rng(3)
    rows = random_rows(rng, np.arange(1, 30))
    merged = list(merge_sorted(split(to_batch(rows), rng, 7), iter([])))
    assert [r for b in merged for r in to_dicts(b)] == rows
    assert list(merge_sorted(iter([]), iter([]))) == []


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_rows_not_in_equals_set_difference(seed):
    rng = np.random.default_rng(seed)
    older = random_rows(rng, rng.choice(np.arange(1, 3000), size=300, replace=False))
    newer = []
    for row in older:
        draw = rng.random()
        if draw < 0.1:
            continue  # left the set (a consensus that became a tie)
        changed = dict(row)
        if draw < 0.2:
            changed["expert_action"] = (row["expert_action"] + 1) % 3
        elif draw < 0.3:
            changed["label_count"] = row["label_count"] + 1
        elif draw < 0.35:
            changed["agreement"] = 0.75
        newer.append(changed)
    taken = {r["step_id"] for r in older}
    fresh = [i for i in range(1, 3500) if i not in taken][:80]
    newer = sorted(
        newer + random_rows(rng, np.array(rng.choice(fresh, size=60, replace=False))),
        key=lambda r: r["step_id"],
    )
    got = list(
        rows_not_in(
            split(to_batch(newer), rng, 30), split(to_batch(older, with_features=False), rng, 45)
        )
    )
    got_rows = [r for b in got for r in to_dicts(b)]
    # reference: set difference of whole rows
    assert as_tuples(got_rows) == as_tuples(newer) - as_tuples(older)
    assert len(got_rows) == len(as_tuples(got_rows))


@pytest.mark.parametrize("seed", [0, 1])
def test_content_hash_matches_row_by_row_reference_for_any_batching(seed):
    rng = np.random.default_rng(seed)
    rows = random_rows(rng, np.sort(rng.choice(np.arange(1, 10_000), 500, replace=False)))
    expected = reference_hash(rows, n_features=3, discrete=True, width=3)
    batch = to_batch(rows)
    assert _hash([batch]) == expected
    for max_size in (1, 7, 64):
        assert _hash(split(batch, rng, max_size)) == expected


def test_content_hash_sees_every_change():
    rng = np.random.default_rng(9)
    rows = random_rows(rng, np.arange(1, 200))
    base = _hash([to_batch(rows)])

    def changed(edit) -> str:
        copy = [dict(r) for r in rows]
        edit(copy)
        return _hash([to_batch(copy)])

    def one_ulp(rs):
        rs[10]["features"] = list(rs[10]["features"])
        rs[10]["features"][1] = float(np.nextafter(np.float32(rs[10]["features"][1]), np.inf))

    edits = {
        "feature by one float32 ulp": one_ulp,
        "action": lambda rs: rs[3].update(expert_action=(rs[3]["expert_action"] + 1) % 3),
        "round": lambda rs: rs[4].update(round=(rs[4]["round"] + 1) % 2),
        "source": lambda rs: rs[5].update(
            source="relabel" if rs[5]["source"] != "relabel" else "takeover"
        ),
        "step": lambda rs: rs[6].update(step=rs[6]["step"] + 1),
        "label count": lambda rs: rs[7].update(label_count=rs[7]["label_count"] + 1),
        "agreement": lambda rs: rs[8].update(agreement=rs[8]["agreement"] / 2),
        "rollout key": lambda rs: rs[9].update(rollout="another"),
        "step id": lambda rs: rs[-1].update(step_id=rs[-1]["step_id"] + 1),
    }
    for name, edit in edits.items():
        assert changed(edit) != base, name
    assert _hash(split(to_batch(rows), rng, 5)) == base


def test_content_hash_needs_features():
    rows = random_rows(np.random.default_rng(1), np.arange(1, 5))
    with pytest.raises(ValueError, match="features"):
        ContentHasher(n_features=3, discrete=True, action_width=3).update(
            to_batch(rows, with_features=False)
        )


def test_concat_keeps_rollout_names_of_every_part():
    rng = np.random.default_rng(4)
    rows = random_rows(rng, np.arange(1, 60))
    pieces = [to_batch(rows[:30]), to_batch(rows[30:])]
    assert to_dicts(concat(pieces)) == rows


@pytest.mark.parametrize("seed", [0, 1])
def test_row_counts_per_round_and_source_for_any_batching(seed):
    # reference: the rows counted one by one with Python's collections.Counter; round numbers
    # past the three sources (7, 12) keep the pair apart
    rng = np.random.default_rng(seed)
    rows = random_rows(rng, np.sort(rng.choice(np.arange(1, 10_000), 500, replace=False)))
    for row in rows[::5]:
        row["round"] = int(rng.choice([7, 12]))
    expected = Counter((r["round"], SOURCE_CODES[r["source"]]) for r in rows)
    batch = to_batch(rows)
    for pieces in ([batch], split(batch, rng, 1), split(batch, rng, 37)):
        tally = _Tally()
        for piece in pieces:
            tally.add(piece)
        assert tally.counts == dict(expected)
