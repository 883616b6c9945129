"""Peak memory while the server refuses a decompression bomb: a 0.4 MB .npz whose one array
would expand to 400 MB. Its .npy header is read and the file refused before any array data is
decompressed; tracemalloc sees numpy's and Python's allocations in this process, where the
test client runs the app."""

from __future__ import annotations

import io
import struct
import subprocess
import sys
import tracemalloc
import zipfile

import pyarrow as pa
import pyarrow.parquet as pq

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


# A Parquet file whose text column is dictionary-encoded: one 64 KiB value repeated 20,000 times
# in one row group. On disk about 100 KB; decoded, 1.3 GB.
REPEATS = 20_000
VALUE_BYTES = 64 * 1024


def dictionary_bomb() -> bytes:
    table = pa.table(
        {
            "rollout": pa.array(["r"] * REPEATS),
            "step": pa.array(range(REPEATS), pa.int64()),
            "time_s": pa.array([0.1 * i for i in range(REPEATS)]),
            "robot": pa.DictionaryArray.from_arrays(
                pa.array([0] * REPEATS, pa.int32()), pa.array(["x" * VALUE_BYTES])
            ),
        }
    )
    sink = io.BytesIO()
    # no Arrow schema in the file (as other writers make it): readers decode the text densely
    pq.write_table(table, sink, row_group_size=REPEATS, compression="zstd", store_schema=False)
    return sink.getvalue()


READ_IN_A_FRESH_PROCESS = """
import resource, sys
from pathlib import Path
from expertloop.errors import TooLarge
from expertloop.ingest.formats import read_table
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
try:
    read_table(Path(sys.argv[1]), "parquet", max_array_bytes=256 * 1024 * 1024)
    print("accepted")
except TooLarge as exc:
    print("refused:", exc)
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before)
"""
GROWTH_BOUND_KIB = 200 * 1024


def test_a_dictionary_encoded_bomb_is_refused_before_it_is_decoded(tmp_path):
    path = tmp_path / "bomb.parquet"
    path.write_bytes(dictionary_bomb())
    assert path.stat().st_size < 1_000_000
    done = subprocess.run(
        [sys.executable, "-c", READ_IN_A_FRESH_PROCESS, str(path)],
        capture_output=True,
        text=True,
        check=True,
        timeout=300,
    )
    verdict, growth_kib = done.stdout.strip().splitlines()
    print(f"{verdict}; peak RSS grew by {growth_kib} KiB")
    assert verdict.startswith("refused: the Parquet file would expand to")
    assert int(growth_kib) < GROWTH_BOUND_KIB


def test_the_dictionary_bomb_gets_413_over_http_and_leaves_the_store(
    client, loops, uploader, engine
):
    before = row_counts(engine)
    response = client.post(
        URL, files={"file": ("bomb.parquet", dictionary_bomb())}, headers=uploader
    )
    assert response.status_code == 413, response.text
    assert "would expand to" in response.json()["detail"]
    assert row_counts(engine) == before
    assert client.get("/healthz").status_code == 200
