"""Spool an upload to a temporary file in bounded memory, hashing and counting as it goes."""

from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
import time
from collections.abc import AsyncIterator
from pathlib import Path

from ..errors import TooLarge

CHUNK_BYTES = 1024 * 1024
UPLOAD_PREFIX = "upload-"


async def spool(chunks: AsyncIterator[bytes], folder: Path, limit: int) -> tuple[Path, str]:
    """Write chunks to a new file under `folder`; return its path and SHA-256.

    Refuses with 413 as soon as the size passes `limit`, removing the partial file.
    """
    folder.mkdir(parents=True, exist_ok=True)
    digest = hashlib.sha256()
    size = 0
    handle = tempfile.NamedTemporaryFile(dir=folder, prefix=UPLOAD_PREFIX, delete=False)
    path = Path(handle.name)
    try:
        with handle:
            async for chunk in chunks:
                size += len(chunk)
                if size > limit:
                    raise TooLarge(f"the file is larger than the upload limit of {limit} bytes")
                digest.update(chunk)
                handle.write(chunk)
    except BaseException:
        path.unlink(missing_ok=True)
        raise
    return path, digest.hexdigest()


STALE_SPOOL_SECONDS = 24 * 3600


def sweep_stale(
    folder: Path, *, pattern: str = f"{UPLOAD_PREFIX}*", older_than_s: float = STALE_SPOOL_SECONDS
) -> int:
    """Delete spooled entries (`pattern` under `folder`) left by a process that died while using
    them, such as uploads, the links a bag is read through and the folders bags are unpacked
    into; returns how many.

    Only entries untouched for a day go: a file in flight in another process is written
    continuously, so it is never that old. A link counts by its own time (its target may be
    gone already), a folder by the newest entry anywhere inside it (unpacking writes inside).
    """
    if not folder.exists():
        return 0
    cutoff = time.time() - older_than_s
    removed = 0
    for path in folder.glob(pattern):
        try:
            if _last_touched(path) >= cutoff:
                continue
            if path.is_dir() and not path.is_symlink():
                shutil.rmtree(path)
            else:
                path.unlink()
            removed += 1
        except FileNotFoundError:  # another process swept it first
            continue
    return removed


def _last_touched(path: Path) -> float:
    """The newest modification time of a file, a link itself, or a folder and all inside it."""
    newest = path.lstat().st_mtime
    if path.is_dir() and not path.is_symlink():
        for root, dirs, files in os.walk(path):
            for name in dirs + files:
                try:
                    newest = max(newest, os.lstat(os.path.join(root, name)).st_mtime)
                except FileNotFoundError:
                    continue
    return newest
