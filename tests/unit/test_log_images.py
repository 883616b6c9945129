"""Camera frames from bags: raw sensor_msgs/Image frames become PNG whose pixels, decoded by
Pillow, are the frame's (channel order and row padding undone); compressed frames stay as sent."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

from expertloop.errors import InvalidInput
from expertloop.ingest.logs.images import frame_bytes
from expertloop.ingest.logs.writer import typestore_for

T = typestore_for("mcap").types


def raw_frame(pixels: np.ndarray, encoding: str, *, pad: int = 0, big_endian: bool = False):
    height, width = pixels.shape[:2]
    rows = pixels.reshape(height, -1)
    if pixels.dtype.itemsize == 2:
        rows = rows.astype(">u2" if big_endian else "<u2")
    data = rows.view(np.uint8).reshape(height, -1)
    data = np.hstack([data, np.zeros((height, pad), np.uint8)])
    header = T["std_msgs/msg/Header"](
        stamp=T["builtin_interfaces/msg/Time"](sec=0, nanosec=0), frame_id="cam"
    )
    return T["sensor_msgs/msg/Image"](
        header=header,
        height=height,
        width=width,
        encoding=encoding,
        is_bigendian=int(big_endian),
        step=data.shape[1],
        data=data.reshape(-1),
    )


def decoded(png: bytes) -> np.ndarray:
    return np.asarray(Image.open(io.BytesIO(png)))


RGB = np.random.default_rng(3).integers(0, 256, size=(5, 7, 3), dtype=np.uint8)


def test_rgb8_with_row_padding():
    png = frame_bytes(raw_frame(RGB, "rgb8", pad=3), "sensor_msgs/msg/Image", where="t")
    assert png.startswith(b"\x89PNG")
    np.testing.assert_array_equal(decoded(png), RGB)


def test_bgr8_channels_are_reordered():
    png = frame_bytes(raw_frame(RGB[:, :, ::-1].copy(), "bgr8"), "sensor_msgs/msg/Image", where="t")
    np.testing.assert_array_equal(decoded(png), RGB)


@pytest.mark.parametrize("big_endian", [False, True])
def test_mono16_keeps_sixteen_bits(big_endian):
    depth = np.random.default_rng(4).integers(0, 65536, size=(4, 6, 1), dtype=np.uint16)
    png = frame_bytes(
        raw_frame(depth, "mono16", big_endian=big_endian), "sensor_msgs/msg/Image", where="t"
    )
    np.testing.assert_array_equal(decoded(png).astype(np.uint16), depth[:, :, 0])


def test_unknown_encoding_and_short_data_are_refused():
    with pytest.raises(InvalidInput, match="encoding 'yuv422'"):
        frame_bytes(raw_frame(RGB, "yuv422"), "sensor_msgs/msg/Image", where="t")
    short = raw_frame(RGB, "rgb8")
    short.data = short.data[:-1]
    with pytest.raises(InvalidInput, match="too few bytes"):
        frame_bytes(short, "sensor_msgs/msg/Image", where="t")


def test_compressed_frames_pass_through_and_others_are_refused():
    out = io.BytesIO()
    Image.fromarray(RGB).save(out, format="JPEG")
    header = T["std_msgs/msg/Header"](
        stamp=T["builtin_interfaces/msg/Time"](sec=0, nanosec=0), frame_id="cam"
    )
    jpeg = T["sensor_msgs/msg/CompressedImage"](
        header=header, format="jpeg", data=np.frombuffer(out.getvalue(), np.uint8)
    )
    assert frame_bytes(jpeg, "sensor_msgs/msg/CompressedImage", where="t") == out.getvalue()
    jpeg.data = np.frombuffer(b"GIF89a....", np.uint8)
    with pytest.raises(InvalidInput, match="not JPEG or PNG"):
        frame_bytes(jpeg, "sensor_msgs/msg/CompressedImage", where="t")
