"""Peak memory while the server refuses a decompression bomb: a 0.4 MB .npz whose one array
would expand to 400 MB. Its .npy header is read and the file refused before any array data is
decompressed; tracemalloc sees numpy's and Python's allocations in this process, where the
test client runs the app."""

from __future__ import annotations

import io
import struct
import tracemalloc
import zipfile

from tests.hostile.conftest import row_counts

URL = "/api/loops/aisle-crossing/rounds/1/rollouts"
N_VALUES = 100_000_000  # float32: 400 MB once decompressed
PEAK_BOUND_BYTES = 16 * 1024 * 1024


def bomb() -> bytes:
    header = repr({"descr": "<f4", "fortran_order": False, "shape": (N_VALUES,)}).encode()
    header += b" " * (63 - (len(header) + 10) % 64) + b"\n"
    sink = io.BytesIO()
    with zipfile.ZipFile(sink, "w", zipfile.ZIP_DEFLATED) as archive:
        with archive.open("features.npy", "w", force_zip64=True) as member:
            member.write(b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header)
            zeros = bytes(4 * 1024 * 1024)
            for _ in range(N_VALUES * 4 // len(zeros)):
                member.write(zeros)
    return sink.getvalue()


def test_a_decompression_bomb_is_refused_in_bounded_memory(client, loops, uploader, engine):
    data = bomb()
    assert len(data) < 1_000_000
    before = row_counts(engine)
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        response = client.post(URL, files={"file": ("bomb.npz", data)}, headers=uploader)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert response.status_code == 413, response.text
    assert "would expand to 400000000 bytes" in response.json()["detail"]
    print(f"peak traced memory while refusing a {len(data)}-byte .npz bomb: {peak} bytes")
    assert peak < PEAK_BOUND_BYTES, peak
    assert row_counts(engine) == before
    assert client.get("/healthz").status_code == 200
