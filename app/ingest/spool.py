"""Spool an upload to a temporary file in bounded memory, hashing and counting as it goes."""

from __future__ import annotations

import hashlib
import tempfile
from collections.abc import AsyncIterator
from pathlib import Path

from app.errors import TooLarge

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
