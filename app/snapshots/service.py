"""Store access for snapshots: create immutable versions, find them, stream their rows.

A snapshot stores only its cut-off (round, largest step id, largest label id), its manifest and
the content hash: steps and labels are never changed, so its rows can be rebuilt from the cut-off
at any time, and every export rebuilt from the store re-checks them against the hash. The full
Parquet export, the one training jobs pull again and again, is also kept as a file per version
(app.snapshots.files), written in the same pass over the rows that makes the version.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator
from contextlib import ExitStack
from dataclasses import dataclass
from datetime import UTC
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy import func, select, text
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from ..auth.models import User
from ..errors import Conflict, InvalidInput, NotFound
from ..limits import shown
from ..loops import service as loops_service
from ..loops.models import Loop, Round
from ..loops.spec import LoopSpec, spec_of
from ..models import utcnow
from ..safety import SAFETY_CAUTION
from ..shared import training_set as ts
from ..shared.overlap import alongside
from ..shared.row_batches import RowBatch, rows_not_in
from . import export, files, stored_rows
from .content_hash import HASH_SCHEME, ContentHasher
from .models import Snapshot
from .names import download_name

LATEST = "latest"
_VERSION = re.compile(r"^v([1-9][0-9]{0,8})$")
# batches that may wait for the content hash while later ones stream on
HASH_AHEAD = 1


class SnapshotChanged(RuntimeError):
    """A snapshot's rows no longer hash to its manifest: the store was altered behind our back."""


# The manifest of a version whose consensus gave each annotator one vote per state; versions
# made before counted every label (a span copy beside its author's own answer too), and their
# rows are read back as they were made, so that their content hash still holds.
VOTES = "votes"
ONE_VOTE_EACH = "one per annotator and state"


def cutoff_of(snapshot: Snapshot) -> ts.Cutoff:
    """The cut-off that pins a snapshot's rows."""
    return ts.Cutoff(
        snapshot.up_to_round,
        snapshot.max_step_id,
        snapshot.max_label_id,
        one_vote_each=snapshot.manifest.get(VOTES) == ONE_VOTE_EACH,
    )


def _hasher(loop: Loop) -> ContentHasher:
    spec = spec_of(loop)
    return ContentHasher(
        n_features=spec.n_features, discrete=spec.is_discrete, action_width=spec.action_width
    )


def _settle_writers(session: Session) -> None:
    """Wait for uploads and labels in flight, so no row can later appear below the cut-off.

    PostgreSQL hands out ids when a row is inserted, not when it is committed: a slow upload may
    commit step 100 after step 200 was visible. A SHARE lock waits for every transaction that
    inserted into these tables to finish; rows inserted afterwards get larger ids. SQLite has a
    single writer that takes ids above every committed row, so it needs no lock.
    """
    if session.get_bind().dialect.name == "postgresql":
        session.execute(text("LOCK TABLE steps, labels IN SHARE MODE"))


class _Tally:
    """Row counts per (round, source) while the rows stream by."""

    def __init__(self) -> None:
        self.counts: dict[tuple[int, int], int] = {}

    def add(self, batch: RowBatch) -> None:
        # one int64 key per row: np.unique over rows of a 2-column array (axis=0) sorts them as
        # structured values, some 3.5 ms a batch of 8,192 rows against 0.1 ms for this
        kinds = len(ts.SOURCES)
        keys, counts = np.unique(
            batch.round.astype(np.int64) * kinds + batch.source, return_counts=True
        )
        for key, count in zip(keys.tolist(), counts.tolist(), strict=True):
            pair = divmod(key, kinds)  # (round number, source), as 0 <= source < kinds
            self.counts[pair] = self.counts.get(pair, 0) + count


def create_snapshot(
    session: Session,
    *,
    loop: Loop,
    up_to_round: int | None,
    user_id: int | None,
    reader: Session,
    files_dir: Path,
) -> tuple[Snapshot, bool]:
    """Make the next version of the training set up to a round, or return an identical one.

    Returns the snapshot and whether it was created (False: the newest version with the same
    round and content hash already existed). One pass over the rows computes the content hash
    and writes the version's Parquet file under `files_dir` (its footer, which carries the
    manifest, once the hash is known); the file is moved into place after the version is
    committed. When an identical version exists, the file is kept for it if it has none. The
    pass runs on `reader`, a plain read session: a writer session on SQLite would hold the write
    lock (BEGIN IMMEDIATE) for the whole pass, stalling uploads and labels; the cut-off pins the
    rows, so a separate read is safe.
    """
    if up_to_round is None:
        up_to_round = int(
            session.scalar(select(func.max(Round.number)).where(Round.loop_id == loop.id)) or 0
        )
    loops_service.get_round(session, loop=loop, number=up_to_round)  # NotFound names the round
    _settle_writers(session)
    cutoff = ts.current_cutoff(session, loop=loop, up_to_round=up_to_round)
    session.commit()  # release the lock; the cut-off is now fixed

    spec = spec_of(loop)
    hasher, tally = _hasher(loop), _Tally()

    def count(batch: RowBatch) -> None:
        hasher.update(batch)
        tally.add(batch)

    batches = ts.iter_batches(reader, loop=loop, spec=spec, cutoff=cutoff)
    parquet = export.ParquetRows(spec)
    spool = files.Spool(files.loop_folder(files_dir, loop.id), prefix="new.")
    try:
        # this thread reads; hashing, encoding and the file each run on a thread of their own
        counted = alongside(batches, count, depth=HASH_AHEAD, name="content-hash")
        for _ in export.row_groups(counted, parquet, spool.write):
            pass
        reader.commit()  # end the read transaction: SQLite's WAL cannot be reset under it
        if hasher.rows == 0:
            raise InvalidInput(
                f"nothing to snapshot: loop '{loop.slug}' has no demonstrations, takeovers or "
                f"resolved relabels up to round {up_to_round}"
            )
        content = hasher.hexdigest()
        existing = _identical(session, loop=loop, up_to_round=up_to_round, content=content)
        if existing is not None:
            _keep_file(spool, parquet, existing, files_dir)
            return existing, False
        snapshot = _add_version(
            session, loop=loop, cutoff=cutoff, tally=tally, content=content, user_id=user_id
        )
        spool.write(parquet.close(export_metadata(snapshot, None)))
        try:
            session.commit()
        except IntegrityError as exc:  # another request took this version number first
            session.rollback()
            existing = _identical(session, loop=loop, up_to_round=up_to_round, content=content)
            if existing is not None:
                return existing, False
            raise Conflict(
                f"another snapshot of '{loop.slug}' was created at the same moment; try again"
            ) from exc
        spool.keep(files.parquet_path(files_dir, snapshot))
        return snapshot, True
    finally:
        spool.discard()


def _keep_file(
    spool: files.Spool, parquet: export.ParquetRows, snapshot: Snapshot, files_dir: Path
) -> None:
    """Store the spooled rows as `snapshot`'s file, unless it has one (its rows are the same)."""
    path = files.parquet_path(files_dir, snapshot)
    if spool.writing and files.stored(path) is None:
        spool.write(parquet.close(export_metadata(snapshot, None)))
        spool.keep(path)


def _add_version(
    session: Session,
    *,
    loop: Loop,
    cutoff: ts.Cutoff,
    tally: _Tally,
    content: str,
    user_id: int | None,
) -> Snapshot:
    """The next version of the loop with its manifest, added to the session (not committed)."""
    version = int(
        session.scalar(select(func.max(Snapshot.version)).where(Snapshot.loop_id == loop.id)) or 0
    )
    created_at = utcnow()
    manifest = build_manifest(
        session,
        loop=loop,
        version=version + 1,
        cutoff=cutoff,
        counts=tally.counts,
        content=content,
        created_at_iso=created_at.astimezone(UTC).isoformat(),
        user_id=user_id,
    )
    snapshot = Snapshot(
        loop_id=loop.id,
        version=version + 1,
        up_to_round=cutoff.up_to_round,
        max_step_id=cutoff.max_step_id,
        max_label_id=cutoff.max_label_id,
        row_count=sum(tally.counts.values()),
        content_sha256=content,
        manifest=manifest,
        created_at=created_at,
        created_by=user_id,
    )
    session.add(snapshot)
    return snapshot


def _identical(session: Session, *, loop: Loop, up_to_round: int, content: str) -> Snapshot | None:
    return session.scalar(
        select(Snapshot)
        .where(
            Snapshot.loop_id == loop.id,
            Snapshot.up_to_round == up_to_round,
            Snapshot.content_sha256 == content,
        )
        .order_by(Snapshot.version.desc())
        .limit(1)
    )


def build_manifest(
    session: Session,
    *,
    loop: Loop,
    version: int,
    cutoff: ts.Cutoff,
    counts: dict[tuple[int, int], int],
    content: str,
    created_at_iso: str,
    user_id: int | None,
) -> dict[str, Any]:
    """What a version holds and how it was made, stored with it and shipped in every export."""
    per_round: dict[str, int] = {}
    per_source = dict.fromkeys(ts.SOURCES, 0)
    detail = []
    for (number, source), count in sorted(counts.items()):
        per_round[str(number)] = per_round.get(str(number), 0) + count
        per_source[ts.SOURCES[source]] += count
        detail.append({"round": number, "source": ts.SOURCES[source], "rows": count})
    consensus = ts.relabels(session, loop=loop, spec=spec_of(loop), cutoff=cutoff)
    unresolved = consensus.step_id[~consensus.resolved]
    rounds = session.execute(
        select(Round.number, Round.learner_version)
        .where(Round.loop_id == loop.id, Round.number <= cutoff.up_to_round)
        .order_by(Round.number)
    ).all()
    user = session.get(User, user_id) if user_id is not None else None
    return {
        "loop": loop.slug,
        "version": f"v{version}",
        "up_to_round": cutoff.up_to_round,
        "cutoff": {"max_step_id": cutoff.max_step_id, "max_label_id": cutoff.max_label_id},
        "row_count": int(sum(counts.values())),
        "rows_per_round": per_round,
        "rows_per_source": per_source,
        "rows_per_round_and_source": detail,
        "labelled_states": len(consensus.step_id),
        VOTES: ONE_VOTE_EACH if cutoff.one_vote_each else None,
        "unresolved_states": {
            "count": len(unresolved),
            "step_ids": unresolved.tolist(),
            "note": "labelled states without a consensus (a tie, or only unsure answers); "
            "they are left out, never guessed",
        },
        "state_schema": {"features": loop.features},
        "action_space": loop.action_space,
        "learner_versions": {str(n): v for n, v in rounds},
        "columns": list(export.COLUMNS),
        "content_sha256": content,
        "content_hash_scheme": HASH_SCHEME,
        "created_at": created_at_iso,
        "created_by": user.name if user else None,
        "safety_caution": SAFETY_CAUTION,
    }


def list_snapshots(session: Session, *, loop: Loop) -> list[Snapshot]:
    """A loop's snapshots, newest version first."""
    return list(
        session.scalars(
            select(Snapshot).where(Snapshot.loop_id == loop.id).order_by(Snapshot.version.desc())
        )
    )


def get_snapshot(session: Session, *, loop: Loop, version: str) -> Snapshot:
    """Snapshot "vN" or "latest" of a loop, or NotFound / InvalidInput naming the problem."""
    query = select(Snapshot).where(Snapshot.loop_id == loop.id)
    if version == LATEST:
        found = session.scalar(query.order_by(Snapshot.version.desc()).limit(1))
        if found is None:
            raise NotFound(
                f"loop '{loop.slug}' has no snapshots yet; "
                f"create one with POST /api/loops/{loop.slug}/snapshots"
            )
        return found
    match = _VERSION.match(version)
    if match is None:
        raise InvalidInput(
            f"version must be 'latest' or 'v' and a number (v1, v2, ...), got '{shown(version)}'"
        )
    found = session.scalar(query.where(Snapshot.version == int(match.group(1))))
    if found is None:
        raise NotFound(f"loop '{loop.slug}' has no snapshot {version}")
    return found


def resolve_export(
    session: Session, *, loop: Loop, version: str, since: str | None
) -> tuple[Snapshot, Snapshot | None]:
    """The snapshot to export and the earlier one its rows are compared with, if any."""
    snapshot = get_snapshot(session, loop=loop, version=version)
    if since is None:
        return snapshot, None
    older = get_snapshot(session, loop=loop, version=since)
    if older.version > snapshot.version:
        raise InvalidInput(
            f"since=v{older.version} is newer than v{snapshot.version}: since names the version "
            "you already have, which must be the same or earlier"
        )
    return snapshot, older


def _store_rows(
    session: Session, loop: Loop, snapshot: Snapshot, *, with_features: bool = True
) -> Iterator[RowBatch]:
    """A version's rows read from the store in step-id order; with their features, checked
    against its content hash as they stream (SnapshotChanged after the last row if they no longer
    match; the older side of an incremental export is only compared with)."""
    rows = ts.iter_batches(
        session,
        loop=loop,
        spec=spec_of(loop),
        cutoff=cutoff_of(snapshot),
        with_features=with_features,
    )
    return _verified(rows, loop, snapshot) if with_features else rows


def _verified(batches: Iterator[RowBatch], loop: Loop, snapshot: Snapshot) -> Iterator[RowBatch]:
    hasher = _hasher(loop)
    # hashed on a thread of its own while the batch goes on to be encoded (hashlib releases
    # the GIL); the check below waits for the last batch's hash
    yield from alongside(batches, hasher.update, depth=HASH_AHEAD, name="content-hash")
    found = hasher.hexdigest()
    if found != snapshot.content_sha256:
        raise SnapshotChanged(
            f"snapshot v{snapshot.version} of '{loop.slug}' now hashes to {found}, not "
            f"{snapshot.content_sha256}: steps or labels were altered in the store"
        )


def export_metadata(snapshot: Snapshot, since: Snapshot | None) -> dict[str, Any]:
    """What an export file carries besides its rows: the manifest, and the version `since`."""
    return {"manifest": snapshot.manifest, "since": None if since is None else f"v{since.version}"}


@dataclass(frozen=True)
class ExportBytes:
    """An export's bytes as they stream, and their total when known beforehand (stored file)."""

    chunks: Iterator[bytes]
    size: int | None = None


def export_chunks(
    *,
    loop: Loop,
    snapshot: Snapshot,
    since: Snapshot | None,
    file_format: str,
    spool_dir: Path,
    files_dir: Path,
    sessions: Callable[[], Session],
) -> ExportBytes:
    """The bytes of an export file, a piece at a time.

    Rows come from the versions' stored Parquet files under `files_dir` where they are there
    (app.snapshots.files): a full Parquet export streams its file as it is; other formats and
    incremental exports decode the files (app.snapshots.stored_rows; a full .npz export a column
    at a time). A version whose file is missing is read from the store, and a full Parquet
    export stores its file on the way. .npz exports of rows that arrive in batches (from the
    store, or incremental) spool their columns under `spool_dir`.

    Reading the store takes a session of its own from `sessions`, opened with the first piece
    and closed with the stream (taken to the end, or closed early by a client that went away),
    so that the request's session need not stay open while it streams.
    """
    if file_format not in export.EXPORT_FORMATS:
        raise InvalidInput(
            f"format must be one of {list(export.EXPORT_FORMATS)}, got '{file_format}'"
        )
    path = files.parquet_path(files_dir, snapshot)
    if file_format == "parquet" and since is None:
        found = files.stored(path)
        if found is not None:
            size, digest = found
            return ExportBytes(files.read_chunks(path, digest), size)
    # what the stream needs, taken now: the request's session closes before it starts
    spec, metadata = spec_of(loop), export_metadata(snapshot, since)
    newer = _Version(snapshot.id, path)
    older = None if since is None else _Version(since.id, files.parquet_path(files_dir, since))
    loop_id = loop.id

    def produce() -> Iterator[bytes]:
        with ExitStack() as stack:
            sources = _RowSources(stack, spec, sessions, loop_id)
            if file_format == "parquet" and older is None:
                # no stored file when the request came: rebuilt, and stored on the way
                yield from _stored_on_the_way(*sources.in_store(newer.id), newer.path)
                return
            stored = sources.stored(newer) if file_format == "npz" and older is None else None
            if stored is not None:  # read a column at a time, nothing spooled
                yield from stored.npz(metadata)
                return
            rows = sources.rows(newer, older)
            yield from _encoded(rows, spec, metadata, file_format, spool_dir)

    return ExportBytes(produce())


@dataclass(frozen=True)
class _Version:
    id: int
    path: Path  # where its stored Parquet file is kept, if it is


class _RowSources:
    """Where an export's rows come from: each version's stored file while it is there, else the
    store, in a session of its own opened when first needed. Everything opened is closed with
    `stack`."""

    def __init__(
        self, stack: ExitStack, spec: LoopSpec, sessions: Callable[[], Session], loop_id: int
    ) -> None:
        self._stack, self._spec, self._sessions, self._loop_id = stack, spec, sessions, loop_id
        self._session: Session | None = None

    def in_store(self, snapshot_id: int) -> tuple[Session, Loop, Snapshot]:
        if self._session is None:
            self._session = self._stack.enter_context(self._sessions())
        own = self._session
        return own, own.get_one(Loop, self._loop_id), own.get_one(Snapshot, snapshot_id)

    def _from_store(self, version: _Version, *, with_features: bool) -> Iterator[RowBatch]:
        return _store_rows(*self.in_store(version.id), with_features=with_features)

    def stored(self, version: _Version) -> stored_rows.StoredRows | None:
        """The version's stored file, opened (closed with the stack), or None."""
        opened = stored_rows.open_stored(version.path, self._spec)
        if opened is not None:
            self._stack.callback(opened.close)
        return opened

    def rows(self, newer: _Version, older: _Version | None) -> Iterator[RowBatch]:
        """The rows of `newer`, or with `older` those that have no identical row in it."""
        newer_file = self.stored(newer)
        if older is None:
            if newer_file is not None:
                return newer_file.batches()
            return self._from_store(newer, with_features=True)
        older_file = self.stored(older)
        older_rows = (
            older_file.batches(with_features=False)
            if older_file is not None
            else self._from_store(older, with_features=False)
        )
        if newer_file is not None:
            return newer_file.rows_not_in(older_rows)
        return rows_not_in(self._from_store(newer, with_features=True), older_rows)


def _stored_on_the_way(
    session: Session, loop: Loop, snapshot: Snapshot, path: Path
) -> Iterator[bytes]:
    """A full Parquet export rebuilt from the store, stored at `path` as it streams.

    The file is moved into place only once the last chunk was taken: a stream that fails or is
    abandoned leaves nothing behind, and a disk that refuses the file does not stop it.
    """
    spool = files.Spool(path.parent, prefix=path.name + ".")
    try:
        batches = _store_rows(session, loop, snapshot)
        metadata = export_metadata(snapshot, None)
        yield from export.parquet_chunks(batches, spec_of(loop), metadata, spool.write)
        spool.keep(path)
    finally:
        spool.discard()


def _encoded(
    batches: Iterator[RowBatch],
    spec: LoopSpec,
    metadata: dict[str, Any],
    file_format: str,
    spool_dir: Path,
) -> Iterator[bytes]:
    if file_format == "parquet":
        return export.parquet_chunks(batches, spec, metadata)
    if file_format == "npz":
        spool_dir.mkdir(parents=True, exist_ok=True)
        return export.npz_chunks(batches, spec, metadata, spool_dir)
    # export_chunks refused any other format before the answer began
    assert file_format == "jsonl", file_format
    return export.jsonl_chunks(batches, spec)


def export_filename(
    loop: Loop, snapshot: Snapshot, since: Snapshot | None, file_format: str
) -> str:
    """A download name such as tow-tractor-v3.parquet or tow-tractor-v3-since-v1.parquet."""
    return download_name(
        loop.slug, snapshot.version, None if since is None else since.version, file_format
    )
