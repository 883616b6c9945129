"""One Parquet file per snapshot version, written once and streamed to every full export.

A version is immutable, so its full Parquet export is the same bytes every time; training jobs
pull the same version many times (seeds, nodes, reruns). The file is written when the version is
created, in the same pass over the rows that computes its content hash (or by the first export
that finds it missing), and kept in the data folder:

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
from collections.abc import Iterator
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


def loop_folder(folder: Path, loop_id: int) -> Path:
    """Where the files of a loop's versions are kept under `folder`."""
    return folder / f"loop-{loop_id}"


def parquet_path(folder: Path, snapshot: Snapshot) -> Path:
    """Where the full Parquet export of a snapshot is kept under `folder`."""
    manifest = json.dumps(snapshot.manifest, sort_keys=True).encode("utf-8")
    key = hashlib.sha256(manifest).hexdigest()[:16]
    return loop_folder(folder, snapshot.loop_id) / f"v{snapshot.version}-{key}{SUFFIX}"


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


class Spool:
    """A file being written in a folder of stored files, under a temporary name.

    `keep` moves it into place with its SHA-256 beside it; until then no reader can see it. A
    disk that refuses the file is logged once and the spool goes on taking writes, unstored:
    storing the file never stops the stream it is written from.
    """

    def __init__(self, folder: Path, prefix: str) -> None:
        self._hasher = hashlib.sha256()
        self._handle: IO[bytes] | None = None
        try:
            folder.mkdir(parents=True, exist_ok=True)
            self._handle = tempfile.NamedTemporaryFile(  # noqa: SIM115 - closed by keep/discard
                dir=folder, prefix=prefix, suffix=SPOOL_SUFFIX, delete=False
            )
        except OSError as exc:
            log.warning("cannot store the export file in %s: %s", folder, exc)

    @property
    def writing(self) -> bool:
        """Whether the spool still stores what it is given."""
        return self._handle is not None

    def write(self, chunk: bytes) -> None:
        if self._handle is None:
            return
        try:
            self._handle.write(chunk)
            self._hasher.update(chunk)
        except OSError as exc:
            log.warning("cannot store the export file %s: %s", self._handle.name, exc)
            self.discard()

    def keep(self, path: Path) -> bool:
        """Move the spooled file to `path`, its hash first (a reader needs both); whether it
        is stored now. The spool is closed either way."""
        if self._handle is None:
            return False
        spooled = Path(self._handle.name)
        try:
            self._handle.close()
            hash_spool = _hash_path(spooled)
            hash_spool.write_text(self._hasher.hexdigest() + "\n")
            os.replace(hash_spool, _hash_path(path))
            os.replace(spooled, path)
            return True
        except OSError as exc:
            log.warning("cannot store the export file %s: %s", path, exc)
            return False
        finally:
            self._handle = None
            for leftover in (_hash_path(spooled), spooled):
                leftover.unlink(missing_ok=True)

    def discard(self) -> None:
        """Close and remove the spooled file (nothing happens once it was kept)."""
        if self._handle is None:
            return
        self._handle.close()
        Path(self._handle.name).unlink(missing_ok=True)
        self._handle = None


def discard(path: Path) -> None:
    """Remove a stored file and its hash."""
    for target in (_hash_path(path), path):
        target.unlink(missing_ok=True)
