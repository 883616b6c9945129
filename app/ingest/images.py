"""Camera images: which formats are accepted, told by their first bytes (never by a name), and
the content hash each is stored and served by."""

from __future__ import annotations

import hashlib
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np

# Magic numbers (docs/references.md, "Hostile input"): PNG's 8-byte signature, JPEG's start of
# image followed by a marker, WebP's RIFF container whose form type is "WEBP".
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
JPEG_SIGNATURE = b"\xff\xd8\xff"
IMAGE_TYPES = ("image/png", "image/jpeg", "image/webp")
HEAD_BYTES = 12
# Hashing threads: one per core this process may run on (at most 4), each given at least this
# many images, so small uploads hash on the calling thread alone.
HASH_THREADS = min(4, len(os.sched_getaffinity(0)))
HASH_ROWS_PER_THREAD = 2048


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
    threads = min(HASH_THREADS, len(images) // HASH_ROWS_PER_THREAD)
    if threads < 2:
        return _digests(images)
    parts = np.array_split(images, threads)
    with ThreadPoolExecutor(threads) as pool:
        return [digest for part in pool.map(_digests, parts) for digest in part]


def _digests(images: np.ndarray) -> list[str | None]:
    return [None if image is None else hashlib.sha256(image).hexdigest() for image in images]
