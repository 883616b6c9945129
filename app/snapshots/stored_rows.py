"""A version's rows read back from its stored Parquet file, for the exports derived from it.

The .npz and JSON Lines exports of a version, and its incremental (`since=`) exports, hold rows of
its full Parquet export, which the version stored when it was made (app.snapshots.files). Read
from that file they cost one Parquet decode instead of a pass over the store: no page queries, no
consensus votes, no content-hash re-check, and an incremental export reads the older version
without its features. A full .npz export reads the file a column at a time (`StoredRows.npz`),
each member of the archive decoded straight into place, where rows given a batch at a time must
be spooled to disk column by column first.

The file's SHA-256 stands in for the content hash: it is computed again on a thread of its own
while the row groups are decoded, and the last batch (or piece of the archive) is held back until
it matches, so a damaged file never completes an export. It is then deleted; the next export
reads the store (and stores the file again when it is a full Parquet pull). Both the hash and
the decoder read from handles opened before the first row, so a file deleted meanwhile (the
files are a cache) is still read whole.
"""

from __future__ import annotations

import hashlib
import threading
from bisect import bisect_right
from collections.abc import Callable, Iterator
from concurrent.futures import Future
from contextlib import ExitStack
from functools import partial
from io import BufferedReader
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..loops.spec import LoopSpec
from ..shared.arrow_columns import dictionary_codes, fixed_width_floats, numbers
from ..shared.overlap import LANES, mapped_ahead
from ..shared.row_batches import SOURCES, RowBatch, rows_not_in
from . import export, files
from .export import COLUMNS

# the text columns, read as dictionaries: a row group holds a few distinct values of each
TEXT_COLUMNS = ("source", "learner_version", "rollout")
# row groups decoded ahead of the export's encoder
DECODE_AHEAD = 1
T = TypeVar("T")


class StoredRows:
    """An opened stored file, ready to give its rows (`batches`, `rows_not_in`); close it after.

    `open_stored` opens it; a file that is not there (never written, or deleted as cache) gives
    None, and the caller reads the store instead.
    """

    def __init__(self, path: Path, digest: str, spec: LoopSpec) -> None:
        self.path = path
        self._digest = digest
        self._spec = spec
        self._stack = ExitStack()
        self._readers: dict[str, pq.ParquetFile] = {}
        try:
            self._for_hash: BufferedReader = self._stack.enter_context(path.open("rb"))
            self._for_rows = self._stack.enter_context(pa.OSFile(str(path), "rb"))
        except BaseException:
            self._stack.close()
            raise

    def close(self) -> None:
        self._stack.close()

    def _reader(self, role: str) -> pq.ParquetFile:
        """A reader of the file for one thread's use (`role`): Parquet readers are not shared
        between threads, while reads at an offset of the one opened file are safe."""
        if role not in self._readers:
            self._readers[role] = pq.ParquetFile(
                self._for_rows, read_dictionary=list(TEXT_COLUMNS), pre_buffer=False
            )
        return self._readers[role]

    def _decoded(self, role: str, index: int, names: list[str]) -> RowBatch:
        table = self._reader(role).read_row_group(index, columns=names, use_threads=False)
        return _as_batch(table, self._spec, with_features="features" in names)

    def rows_not_in(self, older: Iterator[RowBatch]) -> Iterator[RowBatch]:
        """The file's rows that have no identical row in `older` (app.shared.row_batches), their
        features decoded only in the row groups that have such rows.

        The rows are compared on their keys first (step id, action, label count, agreement: a
        pass without features, which checks the file's hash); an incremental export's rows
        usually sit in a few row groups at the end, and only those are decoded whole.
        """
        starts: list[int] = []  # first step id of each row group compared so far

        def keys() -> Iterator[RowBatch]:
            for batch in self.batches(with_features=False):
                starts.append(int(batch.step_id[0]))
                yield batch

        # rows_not_in gives the new rows of each batch before it takes the next one
        for new in rows_not_in(keys(), older):
            if not len(new):
                continue
            index = bisect_right(starts, int(new.step_id[0])) - 1
            whole = self._decoded("whole", index, list(COLUMNS))
            yield whole.take(np.isin(whole.step_id, new.step_id, assume_unique=True))

    def batches(self, *, with_features: bool = True) -> Iterator[RowBatch]:
        """The file's rows a row group at a time, in step-id order, as the store would give them.

        Raises files.StoredFileDamaged, after deleting the file, when its bytes no longer match
        the SHA-256 written beside it; the last batch is only given once they do.
        """
        names = [c for c in COLUMNS if with_features or c != "features"]

        def decoded(index: int) -> RowBatch:
            return self._decoded("batches", index, names)

        def pieces() -> Iterator[RowBatch]:
            groups = range(self._reader("batches").num_row_groups)
            # decoded on a lane, a row group ahead: one thread's heap serves every export's
            # Arrow buffers (the request's next piece may run on any of the server's threads)
            return mapped_ahead(groups, decoded, depth=DECODE_AHEAD, name="stored-rows")

        return self._verified(pieces)

    def npz(self, metadata: dict[str, Any]) -> Iterator[bytes]:
        """The file's .npz export (app.snapshots.export), read a column at a time.

        Parquet keeps each column's values together, so every member of the archive is decoded
        straight into its place, a row group at a time, where rows that arrive a batch at a time
        must first be spooled to disk column by column. Checked like `batches`: the archive's
        last piece is only given once the file's SHA-256 matches.
        """
        return self._verified(lambda: export.npz_archive(self._npz_members(), metadata))

    def _npz_members(self) -> dict[str, export.NpzMember]:
        rows = self._reader("npz").metadata.num_rows
        members = {
            name: export.NpzMember(
                np.dtype(dtype),
                (rows,) if width is None else (rows, width),
                partial(self._parts, name, partial(_numbers, dtype=np.dtype(dtype), width=width)),
            )
            for name, (dtype, width) in export.npz_numbers(self._spec).items()
        }
        for name in TEXT_COLUMNS:
            table = export.text_table(self._text_values(name) if rows else [])
            members[name] = export.NpzMember(
                table.dtype, (rows,), partial(self._parts, name, partial(_text, dtype=table.dtype))
            )
        return members

    def _column(self, role: str, index: int, name: str) -> Iterator[pa.Array]:
        table = self._reader(role).read_row_group(index, columns=[name], use_threads=False)
        return iter(table.column(0).chunks)

    def _parts(self, name: str, decode: Callable[[pa.Array], np.ndarray]) -> Iterator[np.ndarray]:
        """One column's values a row group at a time, decoded on a lane a row group ahead."""

        def decoded(index: int) -> list[np.ndarray]:
            return [decode(chunk) for chunk in self._column("npz-parts", index, name)]

        groups = range(self._reader("npz").num_row_groups)
        for parts in mapped_ahead(groups, decoded, depth=DECODE_AHEAD, name="stored-rows"):
            yield from parts

    def _text_values(self, name: str) -> list[str]:
        """The distinct values a text column's rows hold ("" for none): what sets the width of
        its member, as `export.npz_chunks` finds it (every row source's name, once any row is
        there)."""
        values: dict[str, None] = {}
        for index in range(self._reader("npz").num_row_groups):
            for chunk in self._column("npz", index, name):
                codes, names = dictionary_codes(chunk, name=name, missing=True)
                for code in np.unique(codes).tolist():
                    values[(names[code] or "") if code >= 0 else ""] = None
        if name != "source":
            return list(values)
        unknown = set(values) - set(SOURCES)
        if unknown:
            raise ValueError(f"unknown row sources {sorted(unknown)} in the file")
        return list(SOURCES)

    def _verified(self, pieces: Callable[[], Iterator[T]]) -> Iterator[T]:
        """What `pieces()` gives, the last piece held back until the file's SHA-256, computed
        meanwhile on a lane of its own, matches (decoding starts inside the check: a damaged
        file may fail to decode at all)."""
        stop = threading.Event()
        with LANES.lane("stored-rows-hash") as worker:
            hashed = worker.submit(_sha256, self._for_hash, stop)
            try:
                yield from self._held(pieces, hashed)
            finally:
                stop.set()
                hashed.exception()  # waits: the lane goes back idle

    def _held(self, pieces: Callable[[], Iterator[T]], hashed: Future[str]) -> Iterator[T]:
        held: list[T] = []
        try:
            for piece in pieces():
                if held:
                    yield held.pop()
                held.append(piece)
        except (pa.ArrowException, ValueError, KeyError, OSError) as error:
            # a damaged file can fail to decode before its hash is known; a sound one is a bug
            self._check(hashed.result())
            raise error
        self._check(hashed.result())
        yield from held

    def _check(self, found: str) -> None:
        if found != self._digest:
            files.discard(self.path)
            raise files.StoredFileDamaged(
                f"{self.path} no longer matches its SHA-256; it was deleted"
            )


def open_stored(path: Path, spec: LoopSpec) -> StoredRows | None:
    """The stored file at `path`, opened, or None when there is no complete one."""
    found = files.stored(path)
    if found is None:
        return None
    try:
        return StoredRows(path, found[1], spec)
    except FileNotFoundError:  # deleted since it was found: the store has the rows
        return None


def _sha256(handle: BufferedReader, stop: threading.Event) -> str:
    hasher = hashlib.sha256()
    handle.seek(0)
    buffer = bytearray(files.READ_BYTES)  # one buffer, read into again and again
    view = memoryview(buffer)
    while not stop.is_set() and (size := handle.readinto(buffer)):
        hasher.update(view[:size])
    return hasher.hexdigest()


def _as_batch(table: pa.Table, spec: LoopSpec, with_features: bool) -> RowBatch:
    """A row group of the export columns as a RowBatch (rollouts numbered within the batch)."""
    if any(c.num_chunks != 1 for c in table.columns):
        table = table.unify_dictionaries().combine_chunks()
    column = {name: table.column(name).chunk(0) for name in table.column_names}
    source_codes, source_names = dictionary_codes(column["source"], name="source")
    unknown = set(source_names) - set(SOURCES)
    if unknown:
        raise ValueError(f"unknown row sources {sorted(map(str, unknown))} in the file")
    to_source = np.array([SOURCES.index(n) for n in source_names] or [0], dtype=np.int8)
    rollout_codes, rollout_keys = dictionary_codes(column["rollout"], name="rollout")
    rounds = numbers(column["round"], np.int64)
    version_codes, version_names = dictionary_codes(
        column["learner_version"], name="learner_version", missing=True
    )
    round_numbers, first_rows = np.unique(rounds, return_index=True)
    action = (
        numbers(column["expert_action"], np.int64)
        if spec.is_discrete
        else fixed_width_floats(column["expert_action"], spec.action_width)
    )
    return RowBatch(
        step_id=numbers(column["step_id"], np.int64),
        source=to_source[source_codes],
        action=action,
        label_count=numbers(column["label_count"], np.int64),
        agreement=numbers(column["agreement"], np.float64),
        round=rounds,
        rollout_id=rollout_codes.astype(np.int64),
        step_index=numbers(column["step"], np.int64),
        features=fixed_width_floats(column["features"], spec.n_features) if with_features else None,
        rollout_keys={i: str(key) for i, key in enumerate(rollout_keys)},
        learner_versions={
            int(r): version_names[version_codes[i]] if version_codes[i] >= 0 else None
            for r, i in zip(round_numbers.tolist(), first_rows.tolist(), strict=True)
        },
    )


def _numbers(array: pa.Array, dtype: np.dtype[Any], width: int | None) -> np.ndarray:
    """A numeric column's rows: one value each, or float32 vectors of `width`."""
    return numbers(array, dtype) if width is None else fixed_width_floats(array, width)


def _text(array: pa.Array, dtype: np.dtype[Any]) -> np.ndarray:
    """A dictionary-encoded text column's rows as fixed-width strings ("" for none)."""
    codes, names = dictionary_codes(array, missing=True)
    # code -1 (no value) takes the last entry, ""
    return np.array([*(name or "" for name in names), ""], dtype=dtype)[codes]
