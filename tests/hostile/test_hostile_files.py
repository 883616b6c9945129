"""Hostile rollout files: every one is refused with a message naming the line, or the row and
column, leaves the store as it was, and leaves the server answering. Limits are the corpus's
small settings (tests/hostile/conftest.py)."""

from __future__ import annotations

import base64
import io
import json
import struct
import zipfile
from collections.abc import Callable

import numpy as np
import pyarrow as pa
import pytest

from tests.helpers import discrete_rows, npz_bytes, parquet_bytes

URL = "/api/loops/aisle-crossing/rounds/1/rollouts"
PNG = b"\x89PNG\r\n\x1a\n" + b"\x00" * 32


def line(**fields) -> str:
    row = {"rollout": "r0", "step": 0, "time_s": 0.0, "features": [1.0, 2.0, 3.0]}
    row.update(fields)
    return json.dumps({k: v for k, v in row.items() if v is not ...})


def lines(*rows: str) -> bytes:
    return ("\n".join(rows) + "\n").encode()


def npy(shape: tuple[int, ...], descr: str, body: bytes = b"") -> bytes:
    """A .npy member whose header declares `shape` and `descr`, followed by `body`."""
    header = repr({"descr": descr, "fortran_order": False, "shape": shape}).encode()
    header += b" " * (63 - (len(header) + 10) % 64) + b"\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header + body


def zipped(members: dict[str, bytes]) -> bytes:
    sink = io.BytesIO()
    with zipfile.ZipFile(sink, "w", zipfile.ZIP_DEFLATED) as archive:
        for name, data in members.items():
            archive.writestr(name, data)
    return sink.getvalue()


def steps_npz(**replace: np.ndarray) -> bytes:
    arrays = {
        "rollout": np.array(["n0", "n0"]),
        "step": np.array([0, 1]),
        "time_s": np.array([0.0, 0.1]),
        "features": np.zeros((2, 3), dtype=np.float32),
    }
    arrays.update(replace)
    return npz_bytes(arrays)


def table(**replace) -> bytes:
    cols = discrete_rows(1, 2)
    cols.update(replace)
    return parquet_bytes({k: v for k, v in cols.items() if v is not ...})


def deep(n: int) -> str:
    return "[" * n + "]" * n


# Image signatures and the float32 bounds: docs/references.md, "Hostile input".
CASES: list[tuple[str, str, Callable[[], bytes], int, str]] = [
    # JSON Lines: encodings, nesting, numbers, kinds
    (
        "latin1",
        "a.jsonl",
        lambda: lines(line()).replace(b'"r0"', b'"r\xe9"'),
        422,
        r"line 1: not UTF-8",
    ),
    ("utf16-bom", "a.jsonl", lambda: line().encode("utf-16"), 422, r"line 1: .*UTF-16"),
    ("utf16-le", "a.jsonl", lambda: line().encode("utf-16-le"), 422, r"line 1"),
    (
        "nested-100k",
        "a.jsonl",
        lambda: lines(line(scene=...)[:-1] + ', "x": ' + deep(100_000) + "}"),
        422,
        r"line 1: JSON nested too deeply",
    ),
    (
        "nested-scene",
        "a.jsonl",
        lambda: lines(line(), line(step=1, time_s=0.1, scene={"a": json.loads(deep(900))})),
        422,
        r"line 2|row 2, column scene",
    ),
    (
        "int-beyond-64",
        "a.jsonl",
        lambda: lines(line(), line(step=2**64, time_s=0.1)),
        422,
        r"line 2, column step: an integer beyond the 64-bit",
    ),
    (
        "int-beyond-64-in-list",
        "a.jsonl",
        lambda: lines(line(features=[1, 2, 2**70])),
        422,
        r"line 1, column features: an integer beyond",
    ),
    (
        "int-5000-digits",
        "a.jsonl",
        lambda: lines(line(), '{"rollout": "r0", "step": ' + "9" * 5000 + "}"),
        422,
        r"line 2: a number has too many digits",
    ),
    (
        "mixed-kinds",
        "a.jsonl",
        lambda: lines(line(), line(step="1", time_s=0.1)),
        422,
        r"line 2, column step: text where line 1 has number",
    ),
    (
        "mixed-lists",
        "a.jsonl",
        lambda: lines(line(), line(step=1, time_s=0.1, features=5)),
        422,
        r"line 2, column features: number where line 1 has list",
    ),
    (
        "not-object",
        "a.jsonl",
        lambda: lines(line(), "[1, 2]"),
        422,
        r"line 2: each line must be a JSON object",
    ),
    (
        "bad-json",
        "a.jsonl",
        lambda: lines(line(), line(step=1), "{oops"),
        422,
        r"line 3: not valid JSON",
    ),
    (
        "image-not-base64",
        "a.jsonl",
        lambda: lines(line(image="***")),
        422,
        r"line 1, column image: not base64",
    ),
    # integer ranges and times
    (
        "step-beyond-int32",
        "a.jsonl",
        lambda: lines(line(), line(step=3_000_000_000, time_s=0.1)),
        422,
        r"row 2, column step: 3000000000 is beyond",
    ),
    (
        "step-negative",
        "a.jsonl",
        lambda: lines(line(step=-1)),
        422,
        r"row 1, column step: must be 0 or more",
    ),
    (
        "time-negative",
        "a.jsonl",
        lambda: lines(line(time_s=-0.5)),
        422,
        r"row 1, column time_s: .*negative",
    ),
    (
        "time-nan",
        "a.jsonl",
        lambda: lines(line(time_s=float("nan"))),
        422,
        r"row 1, column time_s: .*not finite",
    ),
    (
        "uint64-step",
        "a.parquet",
        lambda: table(step=pa.array([0, 2**64 - 1], pa.uint64())),
        422,
        r"row 2, column step: .*64-bit",
    ),
    (
        "int64-step",
        "a.parquet",
        lambda: table(step=pa.array([0, 2**40], pa.int64())),
        422,
        r"row 2, column step: .*beyond the largest step",
    ),
    # names
    (
        "key-nul",
        "a.jsonl",
        lambda: lines(line(rollout="r\x000")),
        422,
        r"row 1, column rollout: .*U\+0000",
    ),
    (
        "key-bidi",
        "a.jsonl",
        lambda: lines(line(rollout="r\u202e0")),
        422,
        r"row 1, column rollout: .*U\+202E",
    ),
    (
        "key-escape",
        "a.jsonl",
        lambda: lines(line(), line(rollout="r\x1b[31m", step=0)),
        422,
        r"row 2, column rollout: .*U\+001B",
    ),
    (
        "key-whitespace",
        "a.jsonl",
        lambda: lines(line(rollout="   ")),
        422,
        r"row 1, column rollout: .*white space",
    ),
    (
        "key-empty",
        "a.jsonl",
        lambda: lines(line(rollout="")),
        422,
        r"row 1, column rollout: .*empty",
    ),
    (
        "key-slash",
        "a.jsonl",
        lambda: lines(line(rollout="site/r0")),
        422,
        r"row 1, column rollout: .*'/'",
    ),
    (
        "key-not-nfc",
        "a.jsonl",
        lambda: lines(line(rollout="cafe\u0301")),
        422,
        r"row 1, column rollout: .*NFC",
    ),
    (
        "key-1mb",
        "a.jsonl",
        lambda: lines(line(rollout="k" * 1_000_000)),
        422,
        r"row 1, column rollout: .*1000000 characters long; at most 200",
    ),
    (
        "robot-long",
        "a.jsonl",
        lambda: lines(line(robot="t" * 201)),
        422,
        r"row 1, column robot: .*201 characters",
    ),
    (
        "robot-nul",
        "a.jsonl",
        lambda: lines(line(robot="t7\x00")),
        422,
        r"row 1, column robot: .*U\+0000",
    ),
    ("key-int", "a.jsonl", lambda: lines(line(rollout=7)), 422, r"column rollout: expected text"),
    # columns
    (
        "misspelt-column",
        "a.jsonl",
        lambda: lines(line(learner_prob=[0.2, 0.3, 0.5])),
        422,
        r"unknown column 'learner_prob'; did you mean learner_probs\?",
    ),
    (
        "upper-case-twin",
        "a.jsonl",
        lambda: lines(line(FEATURES=[1.0, 2.0, 3.0])),
        422,
        r"unknown column 'FEATURES'; did you mean features\?",
    ),
    (
        "no-suggestion",
        "a.jsonl",
        lambda: lines(line(zzzz=1)),
        422,
        r"unknown column 'zzzz' \(columns",
    ),
    (
        "column-control-char",
        "a.jsonl",
        lambda: lines(line(**{"x\x00" + "y" * 500: 1})),
        422,
        r"unknown column 'x\\x00y+…'",
    ),
    (
        "duplicate-column",
        "a.parquet",
        lambda: parquet_bytes(
            pa.Table.from_arrays(
                [
                    pa.array(["r"]),
                    pa.array([0]),
                    pa.array([0.0]),
                    pa.array([[1.0, 2.0, 3.0]]),
                    pa.array([0]),
                ],
                names=["rollout", "step", "time_s", "features", "step"],
            )
        ),
        422,
        r"column 'step' appears more than once",
    ),
    (
        "int-features-beyond-float32",
        "a.jsonl",
        lambda: lines(line(features=[1, 2, 16_777_217])),
        422,
        r"row 1, column features: the integer 16777217 cannot be stored exactly as float32",
    ),
    (
        "float-features-beyond-float32",
        "a.jsonl",
        lambda: lines(line(features=[1.0, 1e39, 3.0])),
        422,
        r"row 1, column features: 1e\+39 is beyond float32's range",
    ),
    (
        "float-feature-column-beyond-float32",
        "a.parquet",
        lambda: table(features=..., gap_m=[1.0, 1e300], speed=[0.0, 0.0], occluded=[0.0, 0.0]),
        422,
        r"row 2, column gap_m: 1e\+300 is beyond float32's range",
    ),
    (
        "float-feature-column-beyond-float32-jsonl",
        "a.jsonl",
        lambda: lines(line(features=..., gap_m=-3.5e38, speed=0.0, occluded=0.0)),
        422,
        r"row 1, column gap_m: -3\.5e\+38 is beyond float32's range",
    ),
    (
        "ensemble-members-differ",
        "a.jsonl",
        lambda: lines(
            line(learner_ensemble=[[1.0, 0.0, 0.0]] * 2),
            line(step=1, time_s=0.1, learner_ensemble=[[1.0, 0.0, 0.0]] * 3),
        ),
        422,
        r"row 2, column learner_ensemble: 3 members where earlier rows have 2",
    ),
    (
        "int-feature-column",
        "a.parquet",
        lambda: table(features=..., gap_m=[1, 2**40], speed=[0.0, 0.0], occluded=[0.0, 0.0]),
        422,
        r"row 2, column gap_m: the integer 1099511627776",
    ),
    (
        "struct-type-dump",
        "a.parquet",
        lambda: table(rollout=pa.array([{f"f{i}": 1 for i in range(200)}] * 2)),
        422,
        r"column rollout: expected text, got struct<.{0,80}…$",
    ),
    # scenes and images
    (
        "scene-too-large",
        "a.jsonl",
        lambda: lines(line(scene={"agents": [], "note": "x" * 9000})),
        422,
        r"row 1, column scene: \d+ bytes; at most 8192",
    ),
    (
        "scene-not-object",
        "a.jsonl",
        lambda: lines(line(scene="[1, 2]")),
        422,
        r"row 1, column scene: must be a JSON object",
    ),
    (
        "scene-agents-shape",
        "a.jsonl",
        lambda: lines(line(scene={"agents": {"x": 1}})),
        422,
        r"row 1, column scene: agents",
    ),
    (
        "scene-agent-nan",
        "a.jsonl",
        lambda: lines(line(scene='{"agents": [{"x": NaN, "y": 0}]}')),
        422,
        r"row 1, column scene: agents.0.x",
    ),
    (
        "scene-agent-text-x",
        "a.jsonl",
        lambda: lines(line(scene={"agents": [{"x": "1", "y": 0}]})),
        422,
        r"row 1, column scene: agents.0.x",
    ),
    (
        "scene-too-many-agents",
        "a.jsonl",
        lambda: lines(line(scene={"agents": [{"x": 0, "y": 0}] * 300})),
        422,
        r"row 1, column scene: agents: .*at most 256",
    ),
    (
        "scene-unknown-key",
        "a.jsonl",
        lambda: lines(line(scene={"agents": [], "script": "<b>"})),
        422,
        r"row 1, column scene: script: extra",
    ),
    (
        "image-html",
        "a.jsonl",
        lambda: lines(line(image=base64.b64encode(b"<html><script>alert(1)</script>").decode())),
        422,
        r"row 1, column image: not a PNG, JPEG or WebP",
    ),
    (
        "image-too-large",
        "a.jsonl",
        lambda: lines(line(image=base64.b64encode(PNG + b"\x00" * 5000).decode())),
        422,
        r"row 1, column image: \d+ bytes; at most 4096",
    ),
    (
        "image-svg",
        "a.parquet",
        lambda: table(image=[b"<svg onload='x'/>", None]),
        422,
        r"row 1, column image: not a PNG",
    ),
    # Parquet
    (
        "parquet-truncated",
        "a.parquet",
        lambda: table()[:-100],
        422,
        r"^not a readable Parquet file \(truncated or damaged\?\)$",
    ),
    (
        "parquet-garbage",
        "a.parquet",
        lambda: b"PAR1" + b"\x00" * 100,
        422,
        r"^not a readable Parquet file",
    ),
    (
        "parquet-expands",
        "a.parquet",
        lambda: parquet_bytes(
            {"rollout": ["r"] * 1_200_000, "step": [0] * 1_200_000, "time_s": [0.0] * 1_200_000}
        ),
        413,
        r"Parquet file would expand to \d+ bytes in memory; at most 8388608",
    ),
    # .npz
    (
        "npz-complex",
        "a.npz",
        lambda: steps_npz(time_s=np.array([0.0, 0.1], dtype=np.complex64)),
        422,
        r"'time_s' has dtype complex64.*no objects, complex numbers",
    ),
    (
        "npz-structured",
        "a.npz",
        lambda: steps_npz(features=np.zeros(2, dtype=[("a", "f4"), ("b", "f4")])),
        422,
        r"'features' has dtype .*records",
    ),
    (
        "npz-object",
        "a.npz",
        lambda: steps_npz(rollout=np.array(["n0", None], dtype=object)),
        422,
        r"'rollout' has dtype object",
    ),
    (
        "npz-4tb",
        "a.npz",
        lambda: zipped({"step.npy": npy((10**12,), "<f4"), "rollout.npy": npy((10**12,), "<U2")}),
        413,
        r"arrays would expand to \d+ bytes in memory; at most 8388608",
    ),
    (
        "npz-lengths",
        "a.npz",
        lambda: steps_npz(step=np.array([0, 1, 2])),
        422,
        r"one row per step; lengths: .*step: 3",
    ),
    (
        "npz-4d",
        "a.npz",
        lambda: steps_npz(features=np.zeros((2, 1, 1, 3), dtype=np.float32)),
        422,
        r"'features' has shape \(2, 1, 1, 3\); one to three",
    ),
    (
        "npz-not-npy",
        "a.npz",
        lambda: zipped({"readme.txt": b"hello"}),
        422,
        r"member 'readme.txt' is not a .npy array",
    ),
    ("npz-truncated", "a.npz", lambda: steps_npz()[:-60], 422, r"^not a readable .npz file"),
    (
        "npz-short-data",
        "a.npz",
        lambda: zipped({"step.npy": npy((1000,), "<i8", b"\x00" * 16)}),
        422,
        r"^not a readable .npz file",
    ),
    (
        "npz-datetime",
        "a.npz",
        lambda: steps_npz(time_s=np.array(["2024-01-01", "2024-01-02"], dtype="datetime64[D]")),
        422,
        r"'time_s' has dtype datetime64",
    ),
    # anything else
    ("empty", "a.jsonl", lambda: b"", 422, r"the file is empty"),
    ("blank-lines", "a.jsonl", lambda: b"\n\n  \n", 422, r"holds no rows"),
    (
        "unknown-format",
        "a.bin",
        lambda: b"\x7fELF" + b"\x00" * 64,
        422,
        r"cannot tell the format of 'a.bin'",
    ),
    (
        "long-name",
        "x" * 300 + "\x1b.bin",
        lambda: b"garbage",
        422,
        r"cannot tell the format of 'x+…'",
    ),
]


@pytest.mark.parametrize(
    ("filename", "build", "status", "names"),
    [pytest.param(*case[1:], id=case[0]) for case in CASES],
)
def test_hostile_file_is_refused(refused, client, loops, uploader, filename, build, status, names):
    data = build()
    refused(
        lambda: client.post(URL, files={"file": (filename, data)}, headers=uploader),
        status,
        names,
    )


def test_the_corpus_is_as_large_as_promised():
    assert len(CASES) >= 60


def test_two_files_in_one_upload_are_refused_not_half_stored(refused, client, loops, uploader):
    """Each file alone would be stored; sent together, neither is (the second used to be
    dropped without a word)."""
    first = parquet_bytes(discrete_rows(n_rollouts=1, steps=5, prefix="a"))
    second = parquet_bytes(discrete_rows(n_rollouts=1, steps=5, prefix="b"))
    refused(
        lambda: client.post(
            URL,
            files=[("file", ("a.parquet", first)), ("file", ("b.parquet", second))],
            headers=uploader,
        ),
        422,
        "one file per upload; this request has 2 parts named 'file'",
    )
