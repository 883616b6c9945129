"""Read a rollout file of any accepted format into one Arrow table with the contract's columns.

Parquet is read by pyarrow; .npz by numpy (never unpickling); JSON Lines line by line so that
errors can name the line. Everything after this module works on the Arrow table only.
"""

from __future__ import annotations

import base64
import json
import zipfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from app.errors import InvalidInput
from app.ingest.contract import FORMATS


def detect_format(path: Path, filename: str) -> str:
    """The file's format from its name, or from its first bytes when the name does not say."""
    lower = filename.lower()
    if lower.endswith(".parquet") or lower.endswith(".pq"):
        return "parquet"
    if lower.endswith(".npz"):
        return "npz"
    if lower.endswith(".jsonl") or lower.endswith(".ndjson"):
        return "jsonl"
    with path.open("rb") as fh:
        head = fh.read(4)
    if head == b"PAR1":
        return "parquet"
    if head[:2] == b"PK":
        return "npz"
    if head[:1] == b"{":
        return "jsonl"
    raise InvalidInput(f"cannot tell the format of '{filename}'; use one of {list(FORMATS)}")


def read_table(path: Path, file_format: str) -> pa.Table:
    """Read a rollout file into an Arrow table; an unreadable file raises InvalidInput."""
    if path.stat().st_size == 0:
        raise InvalidInput("the file is empty")
    if file_format == "parquet":
        table = _read_parquet(path)
    elif file_format == "npz":
        table = _read_npz(path)
    elif file_format == "jsonl":
        table = _read_jsonl(path)
    else:
        raise InvalidInput(f"unknown format '{file_format}'; use one of {list(FORMATS)}")
    if table.num_rows == 0:
        raise InvalidInput("the file holds no rows")
    return table


def _read_parquet(path: Path) -> pa.Table:
    try:
        return pq.read_table(path, memory_map=True)
    except (pa.ArrowException, OSError) as exc:
        raise InvalidInput(f"not a readable Parquet file (truncated or damaged?): {exc}") from exc


def _read_npz(path: Path) -> pa.Table:
    try:
        with np.load(path, allow_pickle=False) as archive:
            arrays = {name: archive[name] for name in archive.files}
    except (ValueError, OSError, zipfile.BadZipFile, EOFError) as exc:
        # allow_pickle=False makes object arrays fail here, which is what we want
        raise InvalidInput(f"not a readable .npz file: {exc}") from exc
    if not arrays:
        raise InvalidInput("the .npz file holds no arrays")
    lengths = {name: len(a) if a.ndim else -1 for name, a in arrays.items()}
    if len(set(lengths.values())) != 1:
        raise InvalidInput(f".npz arrays must all have one row per step; lengths: {lengths}")
    columns = {}
    for name, array in arrays.items():
        columns[name] = _npz_column(name, array)
    return pa.table(columns)


def _npz_column(name: str, array: np.ndarray) -> pa.Array:
    if array.ndim == 1:
        if array.dtype.kind == "U":
            return pa.array(array.astype(object))
        if array.dtype.kind == "S":
            return pa.array(array.tolist(), type=pa.binary())
        if name in ("learner_action", "expert_action") and array.dtype.kind == "i":
            # -1 marks "no action on this step" in an integer column
            return pa.array(array, mask=array < 0)
        return pa.array(array)
    if array.ndim == 2:
        flat = pa.array(np.ascontiguousarray(array).reshape(-1))
        if name in ("learner_action", "expert_action") and array.dtype.kind == "f":
            # a row of NaN marks "no action on this step" in a float matrix
            missing = np.isnan(array).all(axis=1)
            return pa.FixedSizeListArray.from_arrays(flat, array.shape[1], mask=pa.array(missing))
        return pa.FixedSizeListArray.from_arrays(flat, array.shape[1])
    if array.ndim == 3:
        n, m, w = array.shape
        inner = pa.FixedSizeListArray.from_arrays(
            pa.array(np.ascontiguousarray(array).reshape(-1)), w
        )
        return pa.FixedSizeListArray.from_arrays(inner, m)
    raise InvalidInput(f".npz array '{name}' has {array.ndim} dimensions; at most 3 are accepted")


def _read_jsonl(path: Path) -> pa.Table:
    rows = []
    with path.open("rb") as fh:
        for line_number, raw in enumerate(fh, start=1):
            if not raw.strip():
                continue
            try:
                row = json.loads(raw)
            except json.JSONDecodeError as exc:
                raise InvalidInput(f"line {line_number}: not valid JSON ({exc.msg})") from exc
            if not isinstance(row, dict):
                raise InvalidInput(f"line {line_number}: each line must be a JSON object")
            if "scene" in row and row["scene"] is not None and not isinstance(row["scene"], str):
                row["scene"] = json.dumps(row["scene"], separators=(",", ":"), sort_keys=True)
            if isinstance(row.get("image"), str):
                try:
                    row["image"] = base64.b64decode(row["image"], validate=True)
                except ValueError as exc:
                    raise InvalidInput(f"line {line_number}, column image: not base64") from exc
            rows.append(row)
    if not rows:
        raise InvalidInput("the file holds no rows")
    try:
        return pa.Table.from_pylist(rows)
    except (pa.ArrowException, TypeError) as exc:
        raise InvalidInput(f"a column mixes types across lines: {exc}") from exc
