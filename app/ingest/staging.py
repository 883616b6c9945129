"""An upload validated in bounded batches and staged on disk, then read back sorted.

Pass 1 (`stage_file`, no transaction open) reads the file a table of a few MB at a time
(`stream_read`), validates each table's values (`validate.validate_rows`, rows named as in the
file) and appends the validated columns to one file each in a folder beside the spooled upload;
images go to a data file with their content hashes beside. In memory stay only what the checks
across rows need: each rollout's key, step count and robot, and whether the rows arrived sorted
by (rollout, step). A sorted file (the usual case) is checked for repeated steps and times going
backwards as it streams past; an unsorted one has its rollout, step and time columns read back
once, sorted and checked as the whole-file path does (about 36 bytes a row at the peak), and its
staged columns rewritten so that each pass-2 chunk's rows lie together (2 bytes a row kept:
where each row is in its chunk). The refusals are the whole-file path's, with the same messages.

Pass 2 reads the staged columns in (rollout, step) order, in chunks (`StagedUpload.batch`): the
rollouts' content hashes (`StagedUpload.rollout_hashes`, byte for byte those of
`service.rollout_hashes` on the whole file) and the rows to insert.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..loops.spec import LoopSpec
from . import columns as col
from . import stream_read
from .images import content_digests
from .limits import UploadLimits
from .spool import UPLOAD_PREFIX
from .validate import (
    DEFAULT_LIMITS,
    NO_ACTION,
    RowColumns,
    StepBatch,
    check_order,
    repeated_step,
    time_not_after,
    validate_rows,
)

# Rows read back at a time in pass 2 (fewer for wide rows: about BATCH_BYTES of columns).
CHUNK_ROWS = 16_384
DIGEST_BYTES = 32
# The optional per-step columns, in the order of the rollout content hash.
OPTIONAL = ("learner_action", "expert_action", "learner_probs", "learner_ensemble", "learner_std")


class _Column:
    """One fixed-width column written row by row to a file, read back by row ranges."""

    def __init__(self, folder: Path, name: str, dtype: Any, shape: tuple[int, ...]) -> None:
        self.path = folder / f"{name}.bin"
        self.dtype = np.dtype(dtype)
        self.shape = shape
        self.items = int(np.prod(shape, dtype=np.int64))
        self.row_bytes = self.items * self.dtype.itemsize
        self.rows = 0
        self._out: IO[bytes] | None = self.path.open("wb")
        self._in: IO[bytes] | None = None

    def append(self, values: np.ndarray) -> None:
        assert self._out is not None
        values = np.ascontiguousarray(values, dtype=self.dtype)
        self._out.write(values.reshape(-1).view(np.uint8).data)
        self.rows += len(values)

    def fill(self, rows: int, value: Any) -> None:
        if rows > 0:
            self.append(np.full((rows, *self.shape), value, dtype=self.dtype))

    def finish(self) -> None:
        if self._out is not None:
            self._out.close()
            self._out = None

    def read(self, start: int, stop: int, within: np.ndarray | None = None) -> np.ndarray:
        """Rows start..stop as staged; with `within` (a sorted upload's places of its rows in
        their chunk, see StagedUpload), the rows of sorted positions start..stop, which must be
        one whole chunk."""
        if self._in is None:
            self._in = self.path.open("rb")
        self._in.seek(start * self.row_bytes)
        count = (stop - start) * self.items
        block = np.fromfile(self._in, self.dtype, count=count).reshape((stop - start, *self.shape))
        return block if within is None else block[within[start:stop]]

    def rewrite(self, slot_of_row: np.ndarray, rows_at_once: int) -> None:
        """Move every row to its slot (`slot_of_row`, a permutation), reading the file in order
        `rows_at_once` rows at a time. The rows of one read bound for one chunk go to
        consecutive slots (see _Stager._group_by_chunk), so each such run is one write."""
        moved = self.path.with_suffix(".moved")
        fd = os.open(moved, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        try:
            for start in range(0, self.rows, rows_at_once):
                stop = min(self.rows, start + rows_at_once)
                slots = slot_of_row[start:stop]
                by_slot = np.argsort(slots, kind="stable")
                slots = slots[by_slot]
                values = np.ascontiguousarray(self.read(start, stop)[by_slot])
                raw = memoryview(values.tobytes()) if values.size else memoryview(b"")
                runs = np.flatnonzero(np.diff(slots) != 1) + 1
                for a, b in zip([0, *runs.tolist()], [*runs.tolist(), len(slots)], strict=True):
                    data = raw[a * self.row_bytes : b * self.row_bytes]
                    position = int(slots[a]) * self.row_bytes
                    while len(data):
                        written = os.pwrite(fd, data, position)
                        data, position = data[written:], position + written
        finally:
            os.close(fd)
        if self._in is not None:
            self._in.close()
            self._in = None
        os.replace(moved, self.path)

    def close(self) -> None:
        self.finish()
        if self._in is not None:
            self._in.close()
            self._in = None


# Staged values (camera images) are handed to the disk every this many bytes: the kernel is
# asked to start writing them back at once (POSIX_FADV_DONTNEED starts writeback of a file's
# dirty pages on Linux, and lets go of those already written), so that the disk writes while
# the rest of the upload is read and hashed, instead of all of it at the fsync that makes the
# staged images a pack (image_store.adopt_pack).
WRITEBACK_BYTES = 32 << 20
_ADVISE = getattr(os, "posix_fadvise", None)  # not on every system (macOS has none)


class _Blobs:
    """Values of varying length (scene text, images): one data file, and each row's span."""

    def __init__(self, folder: Path, name: str) -> None:
        self.data_path = folder / f"{name}.data"
        self.spans = _Column(folder, f"{name}.spans", np.int64, (2,))  # start, length (-1: none)
        self._out: IO[bytes] | None = self.data_path.open("wb")
        self._fd: int | None = None
        self.size = 0
        self._written_back = 0

    def append(self, values: np.ndarray | list[Any]) -> None:
        assert self._out is not None
        spans = np.full((len(values), 2), -1, dtype=np.int64)
        parts = []
        for i, value in enumerate(values):
            if value is None:
                continue
            data = value.encode() if isinstance(value, str) else value
            spans[i] = (self.size, len(data))
            parts.append(data)
            self.size += len(data)
        # one write for the table: a camera frame is larger than the file's buffer, so each
        # would otherwise be a system call of its own
        self._out.write(b"".join(parts))
        self.spans.append(spans)
        if self.size - self._written_back >= WRITEBACK_BYTES and _ADVISE is not None:
            self._out.flush()
            _ADVISE(self._out.fileno(), 0, 0, os.POSIX_FADV_DONTNEED)
            self._written_back = self.size

    def fill(self, rows: int) -> None:
        self.spans.fill(rows, -1)

    def finish(self) -> None:
        self.spans.finish()
        if self._out is not None:
            self._out.close()
            self._out = None

    def read_span(self, start: int, length: int) -> bytes:
        if self._fd is None:
            self._fd = os.open(self.data_path, os.O_RDONLY)
        parts, got = [], 0
        while got < length:
            part = os.pread(self._fd, length - got, start + got)
            if not part:
                raise OSError(f"staged data ends early: {self.data_path.name}")
            parts.append(part)
            got += len(part)
        return b"".join(parts)

    def read(self, spans: np.ndarray) -> list[bytes | None]:
        """The values of the given spans (rows of `spans.read`), None where there is none."""
        present = spans[:, 1] >= 0
        if not present.any():
            return [None] * len(spans)
        lo = int(spans[present, 0].min())
        hi = int((spans[present, 0] + spans[present, 1]).max())
        if hi - lo <= 2 * int(spans[present, 1].sum()) + 4096:  # close together: one read
            block = self.read_span(lo, hi - lo)
            return [
                None if length < 0 else block[start - lo : start - lo + length]
                for start, length in spans.tolist()
            ]
        return [None if length < 0 else self.read_span(start, length) for start, length in spans]

    def close(self) -> None:
        self.finish()
        self.spans.close()
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None


@dataclass
class _Order:
    """Pass 1's running checks of row order, while the rows still arrive sorted."""

    sorted: bool = True
    last: tuple[str, Any, Any] | None = None  # the previous row's key, step and time
    repeated: col.CellError | None = None
    backwards: col.CellError | None = None

    def add(
        self, keys: list[str], rank: np.ndarray, step: np.ndarray, time_s: np.ndarray, offset: int
    ) -> None:
        """rank: each row's key's rank among this table's keys (sorted as strings)."""
        if not self.sorted:
            return
        key_step = np.diff(rank)
        in_order = (key_step > 0) | ((key_step == 0) & (np.diff(step) >= 0))
        first_key = keys[rank[0]]
        if not in_order.all() or (
            self.last is not None and (self.last[0], self.last[1]) > (first_key, step[0])
        ):
            self.sorted = False
            return
        same = np.empty(len(step), dtype=bool)
        same[1:] = key_step == 0
        prev_step = np.empty_like(step)
        prev_step[1:] = step[:-1]
        prev_time = np.empty_like(time_s)
        prev_time[1:] = time_s[:-1]
        if self.last is None:
            same[0] = False
        else:
            same[0] = self.last[0] == first_key
            prev_step[0], prev_time[0] = self.last[1], self.last[2]
        if self.repeated is None:
            hits = np.flatnonzero(same & (step == prev_step))
            if len(hits):
                i = int(hits[0])
                self.repeated = repeated_step(offset + i, keys[rank[i]], step[i])
        if self.backwards is None:
            hits = np.flatnonzero(same & (time_s <= prev_time))
            if len(hits):
                i = int(hits[0])
                self.backwards = time_not_after(
                    offset + i, keys[rank[i]], step[i], time_s[i], prev_step[i], prev_time[i]
                )
        self.last = (keys[rank[-1]], step[-1], time_s[-1])


@dataclass
class StagedUpload:
    """A validated upload on disk, read back in (rollout, step) order.

    rollout_keys : the distinct rollout keys, sorted
    counts : ndarray of shape (n_rollouts,), steps of each rollout
    chunk_rows : rows of every chunk read back (the last may have fewer)
    within : None when the file was sorted already; otherwise its staged columns were rewritten
        so that each chunk of sorted positions holds its rows together (in file order), and
        within[p], an ndarray of shape (n_steps,), is where in its chunk the row of sorted
        position p is
    """

    folder: Path
    spec: LoopSpec
    n_steps: int
    rollout_keys: list[str]
    robot: list[str | None]
    counts: np.ndarray
    chunk_rows: int
    within: np.ndarray | None
    columns: dict[str, _Column]
    present: dict[str, bool]
    ensemble_size: int
    scene: _Blobs | None
    image: _Blobs | None
    starts: np.ndarray = field(init=False)

    def __post_init__(self) -> None:
        self.starts = np.concatenate([[0], np.cumsum(self.counts)]).astype(np.int64)

    @property
    def has_images(self) -> bool:
        return self.image is not None

    def chunks(self) -> Iterator[tuple[int, int]]:
        """Ranges of sorted positions of a bounded number of rows and bytes."""
        for start in range(0, self.n_steps, self.chunk_rows):
            yield start, min(self.n_steps, start + self.chunk_rows)

    def rollout_index(self, start: int, stop: int) -> np.ndarray:
        return np.searchsorted(self.starts, np.arange(start, stop), side="right") - 1

    def _read(self, name: str, start: int, stop: int) -> np.ndarray:
        return self.columns[name].read(start, stop, self.within)

    def _optional(self, name: str, start: int, stop: int) -> np.ndarray | col.Vectors | None:
        if not self.present.get(name):
            return None
        values = self._read(name, start, stop)
        if f"{name}.present" in self.columns:
            return col.Vectors(values, self._read(f"{name}.present", start, stop))
        return values

    def hash_parts(self) -> list[str]:
        """The staged columns in the order of the content hash (service._content_arrays)."""
        parts = ["step", "time_s", "control", "features"]
        for name in OPTIONAL:
            if self.present.get(name):
                parts.append(name)
                if f"{name}.present" in self.columns:
                    parts.append(f"{name}.present")
        return parts

    def scenes(self, start: int, stop: int) -> np.ndarray | None:
        if self.scene is None:
            return None
        values = self.scene.read(self.scene.spans.read(start, stop, self.within))
        return np.array([None if v is None else v.decode() for v in values], dtype=object)

    def image_digests(self, start: int, stop: int) -> list[str | None] | None:
        if self.image is None:
            return None
        spans = self.image.spans.read(start, stop, self.within)
        digests = self._read("image.sha256", start, stop)
        return [
            None if length < 0 else digest.tobytes().hex()
            for (_, length), digest in zip(spans.tolist(), digests, strict=True)
        ]

    def image_spans(self, start: int, stop: int) -> np.ndarray:
        assert self.image is not None
        return self.image.spans.read(start, stop, self.within)

    def read_image(self, start: int, length: int) -> bytes:
        assert self.image is not None
        return self.image.read_span(start, length)

    def image_file(self) -> tuple[Path, int]:
        """The staged images' data file (every image back to back, in file order) and its
        size: the pack itself when every image in it is new and distinct (image_store)."""
        assert self.image is not None
        self.image.finish()
        return self.image.data_path, self.image.size

    def batch(self, start: int, stop: int) -> StepBatch:
        """Sorted positions start..stop as a StepBatch (rollout indexes into all the keys)."""
        batch = StepBatch(
            rollout_keys=self.rollout_keys,
            rollout_index=self.rollout_index(start, stop),
            row_number=np.arange(start, stop) + 1,
            step=self._read("step", start, stop),
            time_s=self._read("time_s", start, stop),
            control=self._read("control", start, stop),
            features=self._read("features", start, stop),
            learner_action=self._optional("learner_action", start, stop),
            expert_action=self._optional("expert_action", start, stop),
            learner_probs=self._optional("learner_probs", start, stop),  # type: ignore[arg-type]
            learner_ensemble=self._optional("learner_ensemble", start, stop),  # type: ignore[arg-type]
            ensemble_size=self.ensemble_size,
            learner_std=self._optional("learner_std", start, stop),  # type: ignore[arg-type]
            robot=self.robot,
            scene=self.scenes(start, stop),
            image=None,
        )
        # the images stay on disk: their hashes are all the rows need
        batch.__dict__["image_sha256"] = self.image_digests(start, stop)
        return batch

    def rollout_hashes(self) -> list[str]:
        """SHA-256 of each rollout's canonical content, as service.rollout_hashes computes it
        on the whole file: each rollout's rows of one column after another, so every rollout
        has its own running hash and the columns are read one at a time."""
        hashers = [hashlib.sha256() for _ in self.rollout_keys]
        chunks = list(self.chunks())

        def feed(parts: Iterator[tuple[int, int, list[bytes]]]) -> None:
            for start, stop, rows in parts:
                index = self.rollout_index(start, stop)
                bounds = np.flatnonzero(np.diff(index)) + 1
                for a, b in zip(
                    [0, *bounds.tolist()], [*bounds.tolist(), stop - start], strict=True
                ):
                    hashers[index[a]].update(b"".join(rows[a:b]))

        for name in self.hash_parts():
            for start, stop in chunks:
                values = self._read(name, start, stop)
                index = self.rollout_index(start, stop)
                bounds = np.flatnonzero(np.diff(index)) + 1
                for a, b in zip(
                    [0, *bounds.tolist()], [*bounds.tolist(), stop - start], strict=True
                ):
                    hashers[index[a]].update(np.ascontiguousarray(values[a:b]).tobytes())
        if self.scene is not None:
            feed(
                (start, stop, [_scene_digest(v) for v in self.scenes(start, stop)])  # type: ignore[union-attr]
                for start, stop in chunks
            )
        if self.image is not None:
            feed(
                (
                    start,
                    stop,
                    [
                        b"\x00" if d is None else bytes.fromhex(d)
                        for d in self.image_digests(start, stop)  # type: ignore[union-attr]
                    ],
                )
                for start, stop in chunks
            )
        return [h.hexdigest() for h in hashers]

    def close(self) -> None:
        """Close the staged files and delete their folder."""
        for column in self.columns.values():
            column.close()
        for blobs in (self.scene, self.image):
            if blobs is not None:
                blobs.close()
        shutil.rmtree(self.folder, ignore_errors=True)


def _scene_digest(value: str | None) -> bytes:
    return b"\x00" if value is None else hashlib.sha256(value.encode()).digest()


class _Stager:
    """Pass 1: validated tables in, staged columns out."""

    def __init__(self, folder: Path, spec: LoopSpec) -> None:
        self.folder = folder
        self.spec = spec
        self.rows = 0
        self.index: dict[str, int] = {}  # rollout key -> its number, by first appearance
        self.counts = np.zeros(0, dtype=np.int64)
        self.robot: list[str | None] = []
        self.order = _Order()
        width = len(spec.feature_names)
        self.columns: dict[str, _Column] = {
            "rollout": _Column(folder, "rollout", np.int32, ()),
            "step": _Column(folder, "step", np.int64, ()),
            "time_s": _Column(folder, "time_s", np.float64, ()),
            "control": _Column(folder, "control", np.int8, ()),
            "features": _Column(folder, "features", np.float32, (width,)),
        }
        self.present: dict[str, bool] = {}
        self.ensemble_size = 0
        self.scene: _Blobs | None = None
        self.image: _Blobs | None = None

    def add(self, table: pa.Table, rows: RowColumns) -> None:
        n = len(rows.step)
        offset = self.rows
        encoded = pc.dictionary_encode(table["rollout"]).combine_chunks()
        keys: list[str] = encoded.dictionary.to_pylist()
        indices = encoded.indices.to_numpy(zero_copy_only=False)
        number = np.array([self.index.setdefault(k, len(self.index)) for k in keys], np.int32)
        local = number[indices]
        new = len(self.index) - len(self.counts)
        if new:
            self.counts = np.concatenate([self.counts, np.zeros(new, dtype=np.int64)])
            first_row = np.full(len(keys), -1)
            first_row[indices[::-1]] = np.arange(n)[::-1]
            fresh = [j for j in range(len(keys)) if number[j] >= len(self.robot)]
            for j in sorted(fresh, key=lambda j: number[j]):
                self.robot.append(None if rows.robot is None else rows.robot[first_row[j]])
        self.counts += np.bincount(local, minlength=len(self.counts))
        by_key = sorted(range(len(keys)), key=keys.__getitem__)
        rank_of = np.empty(len(keys), dtype=np.int64)
        rank_of[by_key] = np.arange(len(keys))
        sorted_keys = [keys[j] for j in by_key]
        self.order.add(sorted_keys, rank_of[indices], rows.step, rows.time_s, offset)

        c = self.columns
        c["rollout"].append(local)
        c["step"].append(rows.step)
        c["time_s"].append(rows.time_s)
        c["control"].append(rows.control)
        c["features"].append(rows.features)
        for name in OPTIONAL:
            self._add_optional(name, getattr(rows, name), rows.ensemble_size, offset, n)
        if rows.scene is not None and self.scene is None:
            self.scene = _Blobs(self.folder, "scene")
            self.scene.fill(offset)
        if self.scene is not None:
            if rows.scene is None:
                self.scene.fill(n)
            else:
                self.scene.append(rows.scene)
        if rows.image is not None and self.image is None:
            self.image = _Blobs(self.folder, "image")
            self.image.fill(offset)
            c["image.sha256"] = _Column(self.folder, "image.sha256", np.uint8, (DIGEST_BYTES,))
            c["image.sha256"].fill(offset, 0)
        if self.image is not None:
            if rows.image is None:
                self.image.fill(n)
                c["image.sha256"].fill(n, 0)
            else:
                digests = content_digests(rows.image)
                raw = np.zeros((n, DIGEST_BYTES), dtype=np.uint8)
                for i, digest in enumerate(digests):
                    if digest is not None:
                        raw[i] = np.frombuffer(bytes.fromhex(digest), np.uint8)
                self.image.append(rows.image)
                c["image.sha256"].append(raw)
        self.rows += n

    def _add_optional(
        self, name: str, value: np.ndarray | col.Vectors | None, size: int, offset: int, n: int
    ) -> None:
        c = self.columns
        if isinstance(value, col.Vectors):
            if name == "learner_ensemble":
                if size == 0:  # no row of this table has an ensemble
                    value = None
                elif self.ensemble_size and size != self.ensemble_size:
                    first = int(np.flatnonzero(value.present)[0])
                    raise col.fail(
                        offset + first, name, col.members_differ(size, self.ensemble_size)
                    )
                else:
                    self.ensemble_size = size
        if value is not None and name not in c:
            if isinstance(value, col.Vectors):
                c[name] = _Column(self.folder, name, np.float32, value.values.shape[1:])
                c[f"{name}.present"] = _Column(self.folder, f"{name}.present", np.bool_, ())
            else:
                c[name] = _Column(self.folder, name, np.int32, ())
            self._fill(name, offset)
        if name not in c:
            return
        if value is None:
            self._fill(name, n)
        elif isinstance(value, col.Vectors):
            c[name].append(value.values)
            c[f"{name}.present"].append(value.present)
            self.present[name] = self.present.get(name, False) or bool(value.present.any())
        else:
            c[name].append(value)
            self.present[name] = self.present.get(name, False) or bool((value != NO_ACTION).any())

    def _fill(self, name: str, rows: int) -> None:
        c = self.columns
        if f"{name}.present" in c:
            c[name].fill(rows, 0)
            c[f"{name}.present"].fill(rows, False)
        else:
            c[name].fill(rows, NO_ACTION)

    def finish(self) -> StagedUpload:
        for column in self.columns.values():
            column.finish()
        for blobs in (self.scene, self.image):
            if blobs is not None:
                blobs.finish()
        keys = list(self.index)
        by_key = sorted(range(len(keys)), key=keys.__getitem__)
        rank_of = np.empty(len(keys), dtype=np.int64)
        rank_of[by_key] = np.arange(len(keys))
        rollout_keys = [keys[j] for j in by_key]
        chunk_rows = _chunk_rows(self.columns.values())
        within: np.ndarray | None = None
        if self.order.sorted:
            if self.order.repeated is not None:
                raise self.order.repeated
            if self.order.backwards is not None:
                raise self.order.backwards
        else:
            within = self._group_by_chunk(self._sort(rank_of, rollout_keys), chunk_rows)
        columns = {k: v for k, v in self.columns.items() if k != "rollout"}
        self.columns["rollout"].close()
        return StagedUpload(
            folder=self.folder,
            spec=self.spec,
            n_steps=self.rows,
            rollout_keys=rollout_keys,
            robot=[self.robot[j] for j in by_key],
            counts=self.counts[by_key],
            chunk_rows=chunk_rows,
            within=within,
            columns=columns,
            present=self.present,
            ensemble_size=self.ensemble_size,
            scene=self.scene,
            image=self.image,
        )

    def _sort(self, rank_of: np.ndarray, rollout_keys: list[str]) -> np.ndarray:
        """The file row of each sorted position, after the whole-file checks. Each column is
        read back, put in order and let go in turn: about 36 bytes a row at the peak."""
        rank = rank_of.astype(np.int32)[self.columns["rollout"].read(0, self.rows)]
        step = self.columns["step"].read(0, self.rows)
        order = np.lexsort((step, rank))
        rank, step = rank[order], step[order]
        time_s = self.columns["time_s"].read(0, self.rows)[order]
        check_order(rank, step, time_s, order, rollout_keys)
        return order

    def _group_by_chunk(self, order: np.ndarray, chunk_rows: int) -> np.ndarray:
        """Rewrite every staged column so that the rows of each chunk of sorted positions lie
        together, in file order (a distribution sort: one read and one write of each column,
        in bounded pieces); return each sorted position's place within its chunk.

        Reading an unsorted file's rows in sorted order straight from the staged files would
        touch a page for nearly every row, or, mapped, make the whole file resident."""
        n = self.rows
        small = np.int32 if n < 2**31 else np.int64
        chunk_of_row = np.empty(n, dtype=small)  # the chunk each file row's position is in
        chunk_of_row[order] = np.arange(n, dtype=small) // chunk_rows
        slot_of_row = np.empty(n, dtype=small)  # where each file row goes
        slot_of_row[np.argsort(chunk_of_row, kind="stable")] = np.arange(n, dtype=small)
        del chunk_of_row
        staged = [c for name, c in self.columns.items() if name != "rollout"]
        staged += [b.spans for b in (self.scene, self.image) if b is not None]
        for column in staged:  # the data of scenes and images stays where it is
            column.rewrite(slot_of_row, max(1, stream_read.BATCH_BYTES // column.row_bytes))
        within = slot_of_row[order]
        del slot_of_row
        within -= (np.arange(n, dtype=small) // chunk_rows * chunk_rows).astype(small)
        return within.astype(np.int16) if chunk_rows <= 2**15 else within


def _chunk_rows(columns: Iterable[_Column]) -> int:
    """Rows of a chunk read back in pass 2: at most CHUNK_ROWS, and about BATCH_BYTES."""
    row_bytes = sum(c.row_bytes for c in columns) + 64
    return int(max(1, min(CHUNK_ROWS, stream_read.BATCH_BYTES // row_bytes)))


def stage_file(
    path: Path,
    file_format: str,
    spec: LoopSpec,
    *,
    round_number: int,
    limits: UploadLimits = DEFAULT_LIMITS,
) -> StagedUpload:
    """Pass 1: read and validate a rollout file in bounded batches, staging its columns in a new
    folder beside `path` (named as spooled uploads are, so a crash's leftovers are swept).
    Refusals are the whole-file path's; the folder is deleted on a refusal, and by
    `StagedUpload.close` otherwise."""
    folder = Path(tempfile.mkdtemp(dir=path.parent, prefix=UPLOAD_PREFIX))
    stager = _Stager(folder, spec)
    tables = stream_read.iter_tables(
        path, file_format, max_array_bytes=limits.max_array_bytes, scratch=folder
    )
    try:
        for table in tables:
            try:
                rows = validate_rows(table, spec, round_number=round_number, limits=limits)
            except col.CellError as exc:
                if stager.rows == 0:
                    raise
                raise col.fail(exc.row + stager.rows, exc.column, exc.reason) from exc
            stager.add(table, rows)
        return stager.finish()
    except BaseException:
        tables.close()  # a refusal leaves the reader suspended; its spilled columns go now
        for column in stager.columns.values():
            column.close()
        for blobs in (stager.scene, stager.image):
            if blobs is not None:
                blobs.close()
        shutil.rmtree(folder, ignore_errors=True)
        raise
