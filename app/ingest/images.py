"""Camera images: which formats are accepted, told by their first bytes (never by a name)."""

from __future__ import annotations

# Magic numbers (docs/references.md, "Hostile input"): PNG's 8-byte signature, JPEG's start of
# image followed by a marker, WebP's RIFF container whose form type is "WEBP".
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
JPEG_SIGNATURE = b"\xff\xd8\xff"
IMAGE_TYPES = ("image/png", "image/jpeg", "image/webp")
HEAD_BYTES = 12


def image_media_type(head: bytes) -> str | None:
    """The media type of an image from its first bytes, or None when it is none we accept."""
    if head.startswith(PNG_SIGNATURE):
        return "image/png"
    if head.startswith(JPEG_SIGNATURE):
        return "image/jpeg"
    if len(head) >= HEAD_BYTES and head[:4] == b"RIFF" and head[8:12] == b"WEBP":
        return "image/webp"
    return None
