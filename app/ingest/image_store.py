"""Camera images stored in bulk: one pack file per upload, indexed by content hash.

An upload's images that are not stored yet are written back to back into one new pack file,
`<blob_dir>/packs/<name[:2]>/<name>.pack` (a random name), and the `images` table says where
each one is (SHA-256, pack, offset, length). Writing one file per upload instead of one per
image is what makes images cheap to ingest; an image is read back with one range read. Images
stored by earlier versions as single files, `<blob_dir>/<sha[:2]>/<sha>`, have no row and are
still served from there.

All or nothing: the index rows go in with the upload's transaction, and the pack is complete,
fsync'd and in its place before that transaction commits, so a committed row always names bytes
on disk. The pack is written under `packs/incoming/` and renamed into place; a failed upload's
pack is deleted by the caller (`PackWrite.discard`). What a crash can leave: a partial pack in
`packs/incoming/`, swept at start once a day old (`incoming_packs`, app/main.py), or, when the
process dies between the rename and the commit, a whole pack that no row names: never read,
and only the bytes of that one upload.
"""

from __future__ import annotations

import errno
import fcntl
import itertools
import logging
import mmap
import os
import uuid
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from sqlalchemy import Table, bindparam, select, text, update
from sqlalchemy.dialects import sqlite
from sqlalchemy.orm import Session

from .models import StoredImage

log = logging.getLogger(__name__)

PACK_FOLDER = "packs"
INCOMING = "incoming"  # packs being written, before their rename into place
PACK_SUFFIX = ".pack"
# Index rows per statement: SQLite binds each key of a lookup (at most 32,766 parameters);
# PostgreSQL takes them as arrays.
ROWS_PER_STATEMENT = 10_000
# Direct I/O: blocks of this size (a multiple of every device's logical block), staged in a
# buffer of this size; an upload's pack smaller than DIRECT_FROM_BYTES goes through the page cache.
DIRECT_BLOCK = 4096
STAGING_BYTES = 8 << 20
# Bytes of images a buffered write takes from its source at a time.
BUFFERED_BYTES = 8 << 20
DIRECT_FROM_BYTES = 1 << 20
# Buffers per writev call: the system's limit (IOV_MAX), or POSIX's minimum.
_IOV_MAX = os.sysconf("SC_IOV_MAX") if "SC_IOV_MAX" in os.sysconf_names else 1024
# The index as a Core table: bulk statements with ON CONFLICT, no ORM objects.
IMAGES: Table = StoredImage.__table__  # type: ignore[assignment]


@dataclass(frozen=True)
class PackWrite:
    """A pack written for an upload whose transaction has not committed yet."""

    path: Path

    def discard(self) -> None:
        """Delete the pack: its upload's transaction rolled back, so no row names it."""
        self.path.unlink(missing_ok=True)


def pack_path(blob_dir: Path, name: str) -> Path:
    return blob_dir / PACK_FOLDER / name[:2] / f"{name}{PACK_SUFFIX}"


def incoming_packs(blob_dir: Path) -> Path:
    """The folder packs are written in before their rename into place."""
    return blob_dir / PACK_FOLDER / INCOMING


def legacy_path(blob_dir: Path, sha256: str) -> Path:
    """Where versions before packs stored an image: one file named by its hash."""
    return blob_dir / sha256[:2] / sha256


def store_images(
    session: Session,
    *,
    images: np.ndarray,
    sha256: Sequence[str | None],
    blob_dir: Path,
) -> PackWrite | None:
    """Store the images that are not stored yet in one new pack; index them in the session's
    transaction. Returns the pack, or None when every image was stored already.

    images : ndarray of shape (n,), object: bytes or None
    sha256 : the images' hashes (`images.content_digests`), None where there is no image

    An image is stored once. Within the upload, repeats are dropped. Against other uploads, the
    index says which images this upload stores. On PostgreSQL, where uploads store at the same
    time, the rows go in with ON CONFLICT DO NOTHING RETURNING: a row already committed is
    skipped, and a row another upload is inserting makes this insert wait for that upload's
    outcome (skipped if it commits, ours if it rolls back); rows go in hash order, so two
    uploads wait for each other in one order, never in a cycle. On SQLite the upload holds the
    one write lock, so what is not indexed yet is its own. Only the images this upload owns go
    into its pack.
    """
    first: dict[str, int] = {}  # hash -> its first row, in step order
    for row, digest in enumerate(sha256):
        if digest is not None and digest not in first:
            first[digest] = row
    return store_image_rows(
        session,
        lengths={digest: len(images[row]) for digest, row in first.items()},
        read=lambda digest: images[first[digest]],
        blob_dir=blob_dir,
    )


@dataclass(frozen=True)
class StagedImages:
    """An upload's images already written back to back in one file (its staging folder).

    path : the file; size : its length in bytes
    starts : where each image starts in it, by hash
    """

    path: Path
    size: int
    starts: dict[str, int]


def store_image_rows(
    session: Session,
    *,
    lengths: dict[str, int],
    read: Callable[[str], bytes],
    blob_dir: Path,
    staged: StagedImages | None = None,
) -> PackWrite | None:
    """store_images for images read one at a time (an upload staged on disk).

    lengths : each distinct image's length by its hash, in the order of their first steps
    read : an image's bytes by its hash; called once for each image this upload stores, in
        that order, while the pack is written (so no more than one is held at a time)
    staged : the file the images were staged in. When it holds exactly these images, each once
        (the usual upload: fresh camera frames), and all of them are new, the file becomes the
        pack: linked into place instead of copied, which saves reading and writing every
        image's bytes once more.
    """
    if not lengths:
        return None
    name = uuid.uuid4().hex
    # The staged file holds nothing else exactly when the distinct images fill it.
    whole = staged if staged is not None and sum(lengths.values()) == staged.size else None
    planned = dict(whole.starts) if whole is not None else _offsets(list(lengths), lengths)
    owned = _claim(session, name=name, offsets=planned, lengths=lengths)
    if not owned:
        return None
    order = [digest for digest in lengths if digest in owned]
    if whole is not None and len(order) == len(lengths):
        adopted = adopt_pack(blob_dir, name, whole.path)
        if adopted is not None:
            return PackWrite(adopted)
    offsets = _offsets(order, lengths)
    # Some were stored already, or by an upload that committed first, or the staged file
    # could not be linked: the pack is written back to back, so close the gaps.
    moved = [{"key": d, "offset": offsets[d]} for d in order if offsets[d] != planned[d]]
    if moved:
        session.execute(
            update(IMAGES)
            .where(IMAGES.c.sha256 == bindparam("key"))
            .values(byte_offset=bindparam("offset")),
            moved,
        )
    total = sum(lengths[d] for d in order)
    return PackWrite(write_pack(blob_dir, name, (read(d) for d in order), total=total))


# Why a hard link may be refused: another file system, or one without hard links.
_NO_LINK = frozenset({errno.EXDEV, errno.EPERM, errno.ENOTSUP, errno.EMLINK})


def adopt_pack(blob_dir: Path, name: str, source: Path) -> Path | None:
    """Make a complete file the pack `name` as well: fsync'd, hard-linked into place, the
    folder fsync'd. A link, not a rename: the file stays where it was too, so a store that is
    retried (PostgreSQL, app/ingest/service.py) after the pack was discarded finds its images
    again. None when the file system refuses the link (the caller copies the images)."""
    final = pack_path(blob_dir, name)
    final.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(source, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
    try:
        os.link(source, final)
    except OSError as exc:
        if exc.errno in _NO_LINK:
            return None
        raise
    _fsync_folder(final.parent)
    return final


def _offsets(order: list[str], lengths: dict[str, int]) -> dict[str, int]:
    """Where each image starts when the images are written back to back in this order."""
    starts = np.concatenate([[0], np.cumsum([lengths[d] for d in order], dtype=np.int64)[:-1]])
    return dict(zip(order, starts.tolist(), strict=True))


def _claim(
    session: Session, *, name: str, offsets: dict[str, int], lengths: dict[str, int]
) -> set[str]:
    """Insert index rows for the images of pack `name`; return the hashes that are now ours."""
    keys = sorted(offsets)
    if session.get_bind().dialect.name == "postgresql":
        return _claim_postgresql(session, name, keys, offsets, lengths)
    # SQLite: the upload's transaction holds the store's one write lock (write_transaction), so
    # what is not indexed now is this upload's to index; bulk statements, no RETURNING.
    stored: set[str] = set()
    for start in range(0, len(keys), ROWS_PER_STATEMENT):
        chunk = keys[start : start + ROWS_PER_STATEMENT]
        stored.update(session.scalars(select(IMAGES.c.sha256).where(IMAGES.c.sha256.in_(chunk))))
    owned = [d for d in keys if d not in stored]
    if owned:
        session.execute(
            sqlite.insert(IMAGES).on_conflict_do_nothing(index_elements=["sha256"]),
            [
                {"sha256": d, "pack": name, "byte_offset": offsets[d], "byte_length": lengths[d]}
                for d in owned
            ],
        )
    return set(owned)


# One statement per ROWS_PER_STATEMENT rows, the values passed as arrays; rows go in hash order.
_CLAIM_POSTGRESQL = text(
    "INSERT INTO images (sha256, pack, byte_offset, byte_length) "
    "SELECT t.sha256, :pack, t.byte_offset, t.byte_length "
    "FROM unnest(CAST(:sha256 AS text[]), CAST(:byte_offset AS bigint[]), "
    "CAST(:byte_length AS integer[])) AS t (sha256, byte_offset, byte_length) "
    "ORDER BY t.sha256 "
    "ON CONFLICT (sha256) DO NOTHING RETURNING sha256"
)


def _claim_postgresql(
    session: Session,
    name: str,
    keys: list[str],
    offsets: dict[str, int],
    lengths: dict[str, int],
) -> set[str]:
    owned: set[str] = set()
    for start in range(0, len(keys), ROWS_PER_STATEMENT):
        chunk = keys[start : start + ROWS_PER_STATEMENT]
        owned.update(
            session.scalars(
                _CLAIM_POSTGRESQL,
                {
                    "pack": name,
                    "sha256": chunk,
                    "byte_offset": [offsets[d] for d in chunk],
                    "byte_length": [lengths[d] for d in chunk],
                },
            )
        )
    return owned


def write_pack(
    blob_dir: Path, name: str, images: Iterable[bytes], *, total: int | None = None
) -> Path:
    """Write images back to back into a new pack: under `incoming/`, fsync'd once, then renamed
    into place (the folder fsync'd too, so the name survives a power cut). Returns its path.

    `images` may be a generator (taken once, in order) when `total`, their summed length, is
    given."""
    if total is None:
        images = list(images)
        total = sum(len(b) for b in images)
    final = pack_path(blob_dir, name)
    incoming = incoming_packs(blob_dir)
    incoming.mkdir(parents=True, exist_ok=True)
    final.parent.mkdir(parents=True, exist_ok=True)
    partial = incoming / final.name
    fd = os.open(partial, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    try:
        try:
            _write_all(fd, images, total)
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(partial, final)
    except BaseException:
        partial.unlink(missing_ok=True)
        raise
    _fsync_folder(final.parent)
    return final


def _write_all(fd: int, buffers: Iterable[bytes], total: int) -> None:
    """Write the buffers back to back from the file's start.

    Direct I/O where the file system offers it: a pack is written once and read rarely (only the
    states chosen for labelling are looked at), so its bytes need not pass through, nor push the
    database's pages out of, the page cache; and taking fresh page-cache pages is most of what a
    buffered write of an upload's images costs. Direct writes go out in aligned blocks from one
    reused staging buffer; where they are refused (tmpfs, some network file systems), the rest
    is written through the page cache.
    """
    pending = iter(buffers)
    if total >= DIRECT_FROM_BYTES and _set_direct(fd, True):
        try:
            _write_direct(fd, pending, total)
            return
        except _DirectRefused as refused:
            _set_direct(fd, False)
            os.lseek(fd, refused.position, os.SEEK_SET)
            # the buffers not taken yet are still in `pending`
            pending = itertools.chain([refused.pending], pending)
    _write_buffered(fd, pending)


class _DirectRefused(Exception):
    """A direct write was refused: where the file stands, and what is left to write."""

    def __init__(self, position: int, pending: bytes) -> None:
        self.position, self.pending = position, pending


def _write_direct(fd: int, buffers: Iterator[bytes], total: int) -> None:
    staging = mmap.mmap(-1, STAGING_BYTES)  # page-aligned, so aligned for direct I/O
    view = memoryview(staging)
    try:
        position = filled = 0
        for buffer in buffers:
            data = memoryview(buffer)
            while data:
                take = min(len(data), STAGING_BYTES - filled)
                view[filled : filled + take] = data[:take]
                filled += take
                data = data[take:]
                if filled == STAGING_BYTES:
                    _flush(fd, view, filled, filled, position, data)
                    position += filled
                    filled = 0
        if filled:
            padded = filled + (-filled) % DIRECT_BLOCK  # whole blocks; the padding is cut below
            view[filled:padded] = bytes(padded - filled)
            _flush(fd, view, padded, filled, position, memoryview(b""))
            os.ftruncate(fd, total)
    finally:
        view.release()
        staging.close()


def _flush(
    fd: int,
    view: memoryview,
    size: int,
    filled: int,
    position: int,
    rest: memoryview,
) -> None:
    """Write the first `size` bytes of the staging buffer (`filled` of them data) directly; on a
    refusal or a short write, say where the file stands and what is left."""
    try:
        written = os.write(fd, view[:size])
    except OSError as exc:
        if exc.errno != errno.EINVAL:
            raise
        written = 0
    if written < filled:
        pending = bytes(view[written:filled]) + bytes(rest)
        raise _DirectRefused(position + written, pending)


def _write_buffered(fd: int, buffers: Iterator[bytes]) -> None:
    """Write the buffers in order with as few system calls as the system allows (writev, which
    may write less than asked: the rest is written by the next call). Buffers are taken from
    the iterator at most IOV_MAX or BUFFERED_BYTES at a time, so a generator reading images
    from disk is never drained into memory."""
    views: list[memoryview] = []
    held = 0
    for buffer in itertools.chain(buffers, [None]):
        if buffer is not None:
            views.append(memoryview(buffer))
            held += len(buffer)
            if len(views) < _IOV_MAX and held < BUFFERED_BYTES:
                continue
        _writev_all(fd, views)
        views, held = [], 0


def _writev_all(fd: int, views: list[memoryview]) -> None:
    i = 0
    while i < len(views):
        batch = views[i : i + _IOV_MAX]
        written = os.writev(fd, batch)
        for view in batch:
            if written < len(view):
                views[i] = view[written:]
                break
            written -= len(view)
            i += 1


def _set_direct(fd: int, on: bool) -> bool:
    """Turn direct I/O on or off for an open file; False where the system has none."""
    direct = getattr(os, "O_DIRECT", 0)
    if not direct:
        return False
    flags = fcntl.fcntl(fd, fcntl.F_GETFL)
    try:
        fcntl.fcntl(fd, fcntl.F_SETFL, flags | direct if on else flags & ~direct)
    except OSError:
        return False
    return True


def _fsync_folder(folder: Path) -> None:
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def read_image(session: Session, *, sha256: str, blob_dir: Path) -> bytes | Path | None:
    """An image by its hash: its bytes when it is in a pack, the path of its single file when an
    earlier version stored it so, None when it is stored nowhere."""
    found = session.execute(
        select(StoredImage.pack, StoredImage.byte_offset, StoredImage.byte_length).where(
            StoredImage.sha256 == sha256
        )
    ).first()
    if found is None:
        old = legacy_path(blob_dir, sha256)
        return old if old.is_file() else None
    pack, offset, length = found
    path = pack_path(blob_dir, pack)
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        log.error("image %s: its pack %s is missing from the blob folder", sha256, path)
        return None
    try:
        parts, got = [], 0
        while got < length:
            part = os.pread(fd, length - got, offset + got)
            if not part:
                break
            parts.append(part)
            got += len(part)
    finally:
        os.close(fd)
    content = b"".join(parts) if len(parts) != 1 else parts[0]
    if len(content) != length:
        log.error("image %s: pack %s ends before the image does", sha256, path)
        return None
    return content
