"""Camera frames from bags as the image bytes a state carries: compressed frames as recorded
(JPEG or PNG), raw frames encoded as PNG with Pillow."""

from __future__ import annotations

import io
from typing import Any

import numpy as np
from PIL import Image

from ...errors import InvalidInput

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
JPEG_MAGIC = b"\xff\xd8\xff"
# raw encodings (sensor_msgs/Image `encoding`) -> (channels, dtype, channel order to RGB(A))
RAW_ENCODINGS: dict[str, tuple[int, str, list[int] | None]] = {
    "rgb8": (3, "u1", None),
    "bgr8": (3, "u1", [2, 1, 0]),
    "rgba8": (4, "u1", None),
    "bgra8": (4, "u1", [2, 1, 0, 3]),
    "mono8": (1, "u1", None),
    "8uc1": (1, "u1", None),
    "mono16": (1, "u2", None),
    "16uc1": (1, "u2", None),
}


def frame_bytes(message: Any, msgtype: str, *, where: str) -> bytes:
    """PNG or JPEG bytes of one decoded Image or CompressedImage message."""
    if msgtype.endswith("CompressedImage"):
        encoded = bytes(message.data)
        if not encoded.startswith((PNG_MAGIC, JPEG_MAGIC)):
            raise InvalidInput(f"{where}: compressed format '{message.format}' is not JPEG or PNG")
        return encoded
    encoding = str(message.encoding).lower()
    if encoding not in RAW_ENCODINGS:
        raise InvalidInput(
            f"{where}: raw image encoding '{message.encoding}' is not one of "
            f"{sorted(RAW_ENCODINGS)}"
        )
    channels, kind, order = RAW_ENCODINGS[encoding]
    height, width, step = int(message.height), int(message.width), int(message.step)
    dtype = np.dtype(kind).newbyteorder(">" if message.is_bigendian else "<")
    row_bytes = width * channels * dtype.itemsize
    data = np.asarray(message.data, dtype=np.uint8)
    if height == 0 or width == 0 or step < row_bytes or len(data) < step * height:
        raise InvalidInput(f"{where}: image of {width}x{height} {encoding} holds too few bytes")
    rows = data[: step * height].reshape(height, step)[:, :row_bytes]
    pixels = rows.copy().view(dtype).reshape(height, width, channels)
    if order is not None:
        pixels = pixels[:, :, order]
    if kind == "u2":
        pixels = pixels.astype("<u2")
    # Pillow picks L, I;16, RGB or RGBA from the array's shape and type
    image = Image.fromarray(np.ascontiguousarray(pixels[:, :, 0] if channels == 1 else pixels))
    out = io.BytesIO()
    image.save(out, format="PNG")
    return out.getvalue()
