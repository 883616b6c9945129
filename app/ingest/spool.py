"""Spool an upload to a temporary file in bounded memory, hashing and counting as it goes."""

from __future__ import annotations

import hashlib
import tempfile
import time
from collections.abc import AsyncIterator
from pathlib import Path

from ..errors import TooLarge

CHUNK_BYTES = 1024 * 1024


async def spool(chunks: AsyncIterator[bytes], folder: Path, limit: int) -> tuple[Path, str]:
    """Write chunks to a new file under `folder`; return its path and SHA-256.

    Refuses with 413 as soon as the size passes `limit`, removing the partial file.
    """
    folder.mkdir(parents=True, exist_ok=True)
    digest = hashlib.sha256()
    size = 0
    handle = tempfile.NamedTemporaryFile(dir=folder, prefix="upload-", delete=False)
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
    folder: Path, *, pattern: str = "upload-*", older_than_s: float = STALE_SPOOL_SECONDS
) -> int:
    """Delete spooled files (`pattern` under `folder`) left by a process that died while writing
    them, such as uploads; returns how many.

    Only files untouched for a day go: a file in flight in another process is written
    continuously, so it is never that old.
    """
    if not folder.exists():
        return 0
    cutoff = time.time() - older_than_s
    removed = 0
    for path in folder.glob(pattern):
        try:
            if path.stat().st_mtime < cutoff:
                path.unlink()
                removed += 1
        except FileNotFoundError:  # another process swept it first
            continue
    return removed
