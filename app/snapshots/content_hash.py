"""The content hash of a training-set version: SHA-256 over a canonical byte form of its rows.

Canonical form, scheme ``expertloop-rows-1`` (rows in step-id order; every number little-endian):

- one byte stream per column, each hashed with its own SHA-256, so the result does not depend on
  how the rows were split into batches:

  ===============  =====================================================================
  ``step_id``      int64 per row
  ``features``     float32 per value, row after row (n_features values per row)
  ``action``       int64 per row (discrete index) or float32 per value (continuous)
  ``round``        int64 per row
  ``source``       uint8 per row: 0 demonstration, 1 takeover, 2 relabel
  ``step``         int64 per row (step index within the rollout)
  ``label_count``  int64 per row
  ``agreement``    float64 per row
  ``rollout``      per run of consecutive rows with one rollout: uint32 byte length of the
                   UTF-8 key, the key, uint64 number of rows in the run
  ===============  =====================================================================

- then the learner version of each round that has rows, in round order: int64 round, uint32
  byte length of the UTF-8 version (0xFFFFFFFF when there is none), the version.

The final hash is SHA-256 over the scheme name, then int64 feature count, uint8 1 for a discrete
or 0 for a continuous action space, int64 action width (actions or dimensions), then for each part above its name and its 32-byte digest. Vectors are stored as float32
bytes and agreement is computed by the same numpy code on every store, so SQLite and PostgreSQL
give the same bytes.
"""

from __future__ import annotations

import hashlib
import struct

import numpy as np

from ..shared.row_batches import RowBatch

HASH_SCHEME = "expertloop-rows-1"
_COLUMNS = (
    "step_id",
    "features",
    "action",
    "round",
    "source",
    "step",
    "label_count",
    "agreement",
)
_NO_VERSION = 0xFFFFFFFF


class ContentHasher:
    """Feed batches of rows in step-id order; read the hex digest when done."""

    def __init__(self, *, n_features: int, discrete: bool, action_width: int) -> None:
        self._header = HASH_SCHEME.encode("utf-8") + struct.pack(
            "<qBq", n_features, 1 if discrete else 0, action_width
        )
        self._discrete = discrete
        self._parts = {name: hashlib.sha256() for name in _COLUMNS}
        self._rollout = hashlib.sha256()
        self._run_key: str | None = None
        self._run_id: int | None = None
        self._run_length = 0
        self._versions: dict[int, str | None] = {}
        self.rows = 0

    def update(self, batch: RowBatch) -> None:
        """Add a batch of rows (with features) that follows every batch added before."""
        if batch.features is None:
            raise ValueError("the content hash needs the features of every row")
        if not len(batch):
            return
        action_dtype = "<i8" if self._discrete else "<f4"
        arrays = {
            "step_id": (batch.step_id, "<i8"),
            "features": (batch.features, "<f4"),
            "action": (batch.action, action_dtype),
            "round": (batch.round, "<i8"),
            "source": (batch.source, "u1"),
            "step": (batch.step_index, "<i8"),
            "label_count": (batch.label_count, "<i8"),
            "agreement": (batch.agreement, "<f8"),
        }
        for name, (values, dtype) in arrays.items():
            # hashed in place when already of that layout (the features: a quarter of a GB
            # at a million rows), copied only to convert
            self._parts[name].update(np.ascontiguousarray(values, dtype=dtype).data)
        self._add_runs(batch)
        for number in np.unique(batch.round).tolist():
            self._versions[number] = batch.learner_versions.get(number)
        self.rows += len(batch)

    def _add_runs(self, batch: RowBatch) -> None:
        ids = batch.rollout_id
        # run starts: where the rollout id changes; a run may continue from the last batch
        starts = np.flatnonzero(np.r_[True, ids[1:] != ids[:-1]])
        lengths = np.diff(np.r_[starts, len(ids)])
        for start, length in zip(starts.tolist(), lengths.tolist(), strict=True):
            rollout_id = int(ids[start])
            if rollout_id == self._run_id:
                self._run_length += length
                continue
            self._close_run()
            self._run_id, self._run_key, self._run_length = (
                rollout_id,
                batch.rollout_keys[rollout_id],
                length,
            )

    def _close_run(self) -> None:
        if self._run_key is None:
            return
        key = self._run_key.encode("utf-8")
        self._rollout.update(
            struct.pack("<I", len(key)) + key + struct.pack("<Q", self._run_length)
        )
        self._run_key, self._run_id, self._run_length = None, None, 0

    def hexdigest(self) -> str:
        """The content hash of every row added so far (adding more afterwards is an error)."""
        self._close_run()
        versions = hashlib.sha256()
        for number in sorted(self._versions):
            name = self._versions[number]
            encoded = b"" if name is None else name.encode("utf-8")
            length = _NO_VERSION if name is None else len(encoded)
            versions.update(struct.pack("<qI", number, length) + encoded)
        final = hashlib.sha256(self._header)
        named = [(n, self._parts[n]) for n in _COLUMNS] + [
            ("rollout", self._rollout),
            ("learner_version", versions),
        ]
        for name, part in named:
            final.update(name.encode("utf-8") + part.digest())
        return final.hexdigest()
