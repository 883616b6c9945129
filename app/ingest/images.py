"""Camera images: which formats are accepted, told by their first bytes (never by a name), and
the content hash each is stored and served by."""

from __future__ import annotations

import hashlib
import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ..shared.cpu_quota import usable_cores

# Magic numbers (docs/references.md, "Hostile input"): PNG's 8-byte signature, JPEG's start of
# image followed by a marker, WebP's RIFF container whose form type is "WEBP".
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
JPEG_SIGNATURE = b"\xff\xd8\xff"
IMAGE_TYPES = ("image/png", "image/jpeg", "image/webp")
HEAD_BYTES = 12
# Hashing threads: one per core this process may use (at most 4; a container's CPU quota
# counts), each given at least this many bytes of images, so a few small images hash on the
# calling thread alone. Counted in bytes, not images: an upload streams through in tables of a
# few MB (stream_read), which hold a couple of hundred camera frames, enough to share among
# threads.
HASH_THREADS = min(4, usable_cores())
HASH_BYTES_PER_THREAD = 1 << 20
_pool: ThreadPoolExecutor | None = None
_pool_lock = threading.Lock()


def image_media_type(head: bytes) -> str | None:
    """The media type of an image from its first bytes, or None when it is none we accept."""
    if head.startswith(PNG_SIGNATURE):
        return "image/png"
    if head.startswith(JPEG_SIGNATURE):
        return "image/jpeg"
    if len(head) >= HEAD_BYTES and head[:4] == b"RIFF" and head[8:12] == b"WEBP":
        return "image/webp"
    return None


def content_digests(images: np.ndarray) -> list[str | None]:
    """The SHA-256 (hex) of each image, None where a step has none: the name an image is stored
    and served by, and its part of a rollout's content hash.

    images : ndarray of shape (n_steps,), object: bytes or None

    Many images are hashed on several threads: hashlib lets go of the GIL while it hashes, and
    hashing is a large share of what an upload with a camera image per step costs.
    """
    total = sum(len(image) for image in images if image is not None)
    threads = min(HASH_THREADS, total // HASH_BYTES_PER_THREAD)
    if threads < 2:
        return _digests(images)
    parts = np.array_split(images, threads)
    return [digest for part in _hash_pool().map(_digests, parts) for digest in part]


def _hash_pool() -> ThreadPoolExecutor:
    """One pool for the process: made once, as a table's images take only milliseconds."""
    global _pool
    with _pool_lock:
        if _pool is None:
            _pool = ThreadPoolExecutor(HASH_THREADS, thread_name_prefix="image-hash")
        return _pool


def _digests(images: np.ndarray) -> list[str | None]:
    return [None if image is None else hashlib.sha256(image).hexdigest() for image in images]
