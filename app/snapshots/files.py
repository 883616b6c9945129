"""One Parquet file per snapshot version, written once and streamed to every full export.

A version is immutable, so its full Parquet export is the same bytes every time; training jobs
pull the same version many times (seeds, nodes, reruns). The file is written when the version is
created (or by the first export that finds it missing) and kept in the data folder:

    <data>/snapshots/loop-<id>/v<N>-<key>.parquet        the export's bytes
    <data>/snapshots/loop-<id>/v<N>-<key>.parquet.sha256 their SHA-256, hex

`key` is a digest of the snapshot's manifest (content hash, cut-off, creation time, ...), so a
file can only ever be served for the very version that wrote it, even if a store is recreated
under the same data folder. Every read re-hashes the bytes and holds back the last piece (the
Parquet footer) until they match: a damaged file is deleted and the download is cut, never
completed with wrong bytes; the next export rebuilds it from the store. The files are a cache:
deleting them loses nothing.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import tempfile
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import IO

from .models import Snapshot

log = logging.getLogger(__name__)

READ_BYTES = 4 * 1024 * 1024
SUFFIX = ".parquet"
HASH_SUFFIX = ".sha256"
SPOOL_SUFFIX = ".part"  # a file being written; servers sweep day-old ones left by a crash


class StoredFileDamaged(RuntimeError):
    """A stored export file no longer matches the hash written beside it."""


def parquet_path(folder: Path, snapshot: Snapshot) -> Path:
    """Where the full Parquet export of a snapshot is kept under `folder`."""
    manifest = json.dumps(snapshot.manifest, sort_keys=True).encode("utf-8")
    key = hashlib.sha256(manifest).hexdigest()[:16]
    return folder / f"loop-{snapshot.loop_id}" / f"v{snapshot.version}-{key}{SUFFIX}"


def _hash_path(path: Path) -> Path:
    return path.with_name(path.name + HASH_SUFFIX)


def stored(path: Path) -> tuple[int, str] | None:
    """Size and SHA-256 of a complete stored file, or None when there is none."""
    try:
        digest = _hash_path(path).read_text().strip()
        size = path.stat().st_size
    except OSError:
        return None
    return (size, digest) if len(digest) == 64 else None


def read_chunks(path: Path, digest: str) -> Iterator[bytes]:
    """The stored file a piece at a time, the last piece only once the whole file hashed right.

    Raises StoredFileDamaged (after deleting the file) when it does not.
    """
    hasher = hashlib.sha256()
    with path.open("rb") as handle:
        held = handle.read(READ_BYTES)
        while held:
            hasher.update(held)
            following = handle.read(READ_BYTES)
            if not following:
                break
            yield held
            held = following
    if hasher.hexdigest() != digest:
        discard(path)
        raise StoredFileDamaged(f"{path} no longer matches its SHA-256; it was deleted")
    if held:
        yield held


def write_through(chunks: Iterable[bytes], path: Path) -> Iterator[bytes]:
    """Pass `chunks` on while writing them to `path`; the file appears only once all arrived.

    The bytes go to a temporary file beside `path`, which is renamed into place when the stream
    ends; a stream that fails or is abandoned leaves nothing behind. Several writers of the same
    file are harmless (same bytes, atomic rename). A disk that refuses the file does not stop
    the stream: it is logged and the chunks flow on unstored.
    """
    spool = _open_spool(path)
    hasher = hashlib.sha256()
    finished = False
    try:
        for chunk in chunks:
            if spool is not None:
                spool = _write(spool, chunk, path)
                hasher.update(chunk)
            yield chunk
        finished = True
    finally:
        if spool is not None:
            spool.close()
            if not (finished and _keep(Path(spool.name), path, hasher.hexdigest())):
                Path(spool.name).unlink(missing_ok=True)


def store(chunks: Iterable[bytes], path: Path) -> bool:
    """Write a whole stream to `path` (see `write_through`); whether the file is now stored."""
    for _ in write_through(chunks, path):
        pass
    return stored(path) is not None


def discard(path: Path) -> None:
    """Remove a stored file and its hash."""
    for target in (_hash_path(path), path):
        target.unlink(missing_ok=True)


def _open_spool(path: Path) -> IO[bytes] | None:
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        return tempfile.NamedTemporaryFile(  # noqa: SIM115 - closed by write_through
            dir=path.parent, prefix=path.name + ".", suffix=SPOOL_SUFFIX, delete=False
        )
    except OSError as exc:
        log.warning("cannot store the export file %s: %s", path, exc)
        return None


def _write(spool: IO[bytes], chunk: bytes, path: Path) -> IO[bytes] | None:
    try:
        spool.write(chunk)
        return spool
    except OSError as exc:
        log.warning("cannot store the export file %s: %s", path, exc)
        spool.close()
        Path(spool.name).unlink(missing_ok=True)
        return None


def _keep(spooled: Path, path: Path, digest: str) -> bool:
    """Move a finished spool into place, its hash first (a reader needs both)."""
    try:
        hash_spool = _hash_path(spooled)
        hash_spool.write_text(digest + "\n")
        os.replace(hash_spool, _hash_path(path))
        os.replace(spooled, path)
        return True
    except OSError as exc:
        log.warning("cannot store the export file %s: %s", path, exc)
        return False
