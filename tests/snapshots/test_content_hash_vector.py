"""A fixed test vector for the content hash of a training-set version (scheme expertloop-rows-1).

The rows, their canonical bytes and the expected digest are written out here, derived by hand
from the scheme documented in the README ("Content hash of a training-set version"); SHA-256 is
Python's hashlib (docs/references.md, "Snapshot content hash"). Nothing below is computed by the
product except the digest under test, so a change of the scheme (byte order, widths, column
order, run encoding) fails here even if a second implementation changed along with it.
"""

from __future__ import annotations

import hashlib

import numpy as np

from expertloop.shared.row_batches import RowBatch
from expertloop.snapshots.content_hash import HASH_SCHEME, ContentHasher

# Three rows of a discrete loop with two features and three actions, in step-id order:
#
#   step_id  features      action  round  source         rollout   step  label_count  agreement
#   1        [0.5, -1.0]   2       0      demonstration  t07-0001  0     1            1.0
#   2        [0.25, 2.0]   0       0      demonstration  t07-0001  1     1            1.0
#   7        [1.5, 0.0]    1       1      relabel        t07-0002  3     4            0.75
#
# Round 0 has no learner version; round 1 was rolled out by learner "v1".
N_FEATURES, DISCRETE, ACTION_WIDTH = 2, True, 3

# The canonical byte stream of each part, little-endian throughout, in hex (spaces between
# fields are for reading; bytes.fromhex ignores them).
CANONICAL = {
    # int64 per row: 1, 2, 7
    "step_id": "0100000000000000 0200000000000000 0700000000000000",
    # float32 per value, row after row: 0.5 = 0x3f000000, -1.0 = 0xbf800000,
    # 0.25 = 0x3e800000, 2.0 = 0x40000000, 1.5 = 0x3fc00000, 0.0
    "features": "0000003f 000080bf 0000803e 00000040 0000c03f 00000000",
    # discrete: int64 action index per row: 2, 0, 1
    "action": "0200000000000000 0000000000000000 0100000000000000",
    # int64 round per row: 0, 0, 1
    "round": "0000000000000000 0000000000000000 0100000000000000",
    # uint8 source per row: 0 demonstration, 0 demonstration, 2 relabel
    "source": "00 00 02",
    # int64 step index per row: 0, 1, 3
    "step": "0000000000000000 0100000000000000 0300000000000000",
    # int64 label count per row: 1, 1, 4
    "label_count": "0100000000000000 0100000000000000 0400000000000000",
    # float64 agreement per row: 1.0 = 0x3ff0000000000000, 0.75 = 0x3fe8000000000000
    "agreement": "000000000000f03f 000000000000f03f 000000000000e83f",
    # per run of rows with one rollout: uint32 key length, UTF-8 key, uint64 rows in the run
    # "t07-0001" = 74 30 37 2d 30 30 30 31 (8 bytes), 2 rows; "t07-0002", 1 row
    "rollout": "08000000 7430372d30303031 0200000000000000 "
    "08000000 7430372d30303032 0100000000000000",
    # per round with rows, in round order: int64 round, uint32 version length (0xffffffff for
    # none), UTF-8 version: round 0 without a version, round 1 "v1" = 76 31
    "learner_version": "0000000000000000 ffffffff 0100000000000000 02000000 7631",
}

# The header: the scheme name in UTF-8, int64 feature count 2, uint8 1 (discrete),
# int64 action width 3.
HEADER = b"expertloop-rows-1".hex() + "0200000000000000 01 0300000000000000"

# SHA-256 over HEADER, then for each part in the order above its name in UTF-8 followed by the
# 32-byte SHA-256 of its canonical bytes (computed once with hashlib by hand, as
# test_the_vector_follows_the_documented_recipe repeats).
EXPECTED_DIGEST = "4a471191b26290bfcb5272b1c1019431d4c633bee1a55fab54c3e03a9ceb337c"


def documented_recipe(header_hex: str, canonical: dict[str, str]) -> str:
    final = hashlib.sha256(bytes.fromhex(header_hex))
    for name, part in canonical.items():
        final.update(name.encode("utf-8") + hashlib.sha256(bytes.fromhex(part)).digest())
    return final.hexdigest()


def vector_rows() -> RowBatch:
    return RowBatch(
        step_id=np.array([1, 2, 7], dtype=np.int64),
        source=np.array([0, 0, 2], dtype=np.int8),
        action=np.array([2, 0, 1], dtype=np.int64),
        label_count=np.array([1, 1, 4], dtype=np.int64),
        agreement=np.array([1.0, 1.0, 0.75]),
        round=np.array([0, 0, 1], dtype=np.int64),
        rollout_id=np.array([11, 11, 12], dtype=np.int64),
        step_index=np.array([0, 1, 3], dtype=np.int64),
        features=np.array([[0.5, -1.0], [0.25, 2.0], [1.5, 0.0]], dtype=np.float32),
        rollout_keys={11: "t07-0001", 12: "t07-0002"},
        learner_versions={0: None, 1: "v1"},
    )


def test_the_vector_follows_the_documented_recipe() -> None:
    assert HASH_SCHEME == "expertloop-rows-1"
    assert documented_recipe(HEADER, CANONICAL) == EXPECTED_DIGEST


def test_content_hasher_gives_the_fixed_digest() -> None:
    hasher = ContentHasher(n_features=N_FEATURES, discrete=DISCRETE, action_width=ACTION_WIDTH)
    hasher.update(vector_rows())
    assert hasher.hexdigest() == EXPECTED_DIGEST
    assert hasher.rows == 3


def test_content_hasher_gives_the_fixed_digest_one_row_at_a_time() -> None:
    # The rollout run t07-0001 continues across batches: still one run of 2 rows.
    rows = vector_rows()
    hasher = ContentHasher(n_features=N_FEATURES, discrete=DISCRETE, action_width=ACTION_WIDTH)
    for i in range(len(rows)):
        hasher.update(rows.take(slice(i, i + 1)))
    assert hasher.hexdigest() == EXPECTED_DIGEST
