"""Uploads read in bounded batches and staged on disk hold exactly what the whole-file path holds:
the same rows in the same (rollout, step) order, and the same rollout content hashes, for
sorted and unsorted files of every format, spread over many batches, with images, scenes and
missing optional values. The whole-file path (`formats.read_table` then `validate.validate`)
is the reference; the content hash is also computed here from its definition with hashlib."""

from __future__ import annotations

import base64
import hashlib
import io
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from expertloop.errors import InvalidInput
from expertloop.ingest import service, staging, stream_read
from expertloop.ingest.columns import Vectors
from expertloop.ingest.formats import read_table
from expertloop.ingest.validate import validate
from expertloop.loops.spec import parse_spec
from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC, jsonl_bytes

PNG = b"\x89PNG\r\n\x1a\n"
ACTIONS = ["proceed", "creep", "hold"]


@pytest.fixture
def small_batches(monkeypatch):
    """Tables of at most 7 rows and pass-2 chunks of 5: a small file crosses many of each."""
    monkeypatch.setattr(stream_read, "MAX_BATCH_ROWS", 7)
    monkeypatch.setattr(stream_read, "BATCH_BYTES", 2048)
    monkeypatch.setattr(staging, "CHUNK_ROWS", 5)


def spec_of(spec: dict):
    return parse_spec(spec["features"], spec["action_space"])


def discrete_columns(n_rollouts: int = 5, steps: int = 9, seed: int = 0) -> dict[str, list]:
    """Rows with every optional column, each missing on some steps: expert-driven steps carry
    an expert action and no learner output; images, scenes and robots come and go."""
    rng = np.random.default_rng(seed)
    cols: dict[str, list] = {
        k: []
        for k in (
            "rollout",
            "step",
            "time_s",
            "features",
            "control",
            "learner_action",
            "learner_probs",
            "learner_ensemble",
            "expert_action",
            "robot",
            "scene",
            "image",
        )
    }
    for r in range(n_rollouts):
        for s in range(steps):
            expert = (r + s) % 4 == 0
            probs = rng.dirichlet(np.ones(3)).astype(np.float32)
            probs = (probs / probs.sum()).tolist()
            cols["rollout"].append(f"roll-{(7 * r) % n_rollouts}")  # keys not in file order
            cols["step"].append(s)
            cols["time_s"].append(0.1 * s)
            cols["features"].append(rng.normal(size=3).round(3).tolist())
            cols["control"].append("expert" if expert else "learner")
            cols["learner_action"].append(None if expert else ACTIONS[int(np.argmax(probs))])
            cols["learner_probs"].append(None if expert else probs)
            cols["learner_ensemble"].append(None if expert or s < 5 else [probs, probs])
            cols["expert_action"].append(ACTIONS[s % 3] if expert else None)
            cols["robot"].append(None if s == 0 and r == 1 else f"amr-{r % 2}")
            cols["scene"].append(
                json.dumps({"agents": [{"x": float(s), "y": 1.0}]}) if s % 3 else None
            )
            image = PNG + hashlib.sha256(f"{r}-{s % 4}".encode()).digest() * 3
            cols["image"].append(image if s % 2 else None)
    return cols


def write(tmp_path: Path, cols: dict[str, list], kind: str, *, row_group: int = 4) -> Path:
    path = tmp_path / f"rows.{kind}"
    if kind == "parquet":
        pq.write_table(pa.table(cols), path, row_group_size=row_group)
    elif kind == "jsonl":
        text = dict(cols)
        if "image" in text:
            text["image"] = [
                None if v is None else base64.b64encode(v).decode() for v in cols["image"]
            ]
        path.write_bytes(jsonl_bytes(text))
    else:
        raise AssertionError(kind)
    return path


def shuffled(cols: dict[str, list], seed: int = 3) -> dict[str, list]:
    order = np.random.default_rng(seed).permutation(len(cols["rollout"]))
    return {k: [v[i] for i in order] for k, v in cols.items()}


def staged_rows(staged: staging.StagedUpload) -> dict[str, list]:
    """Every column of the staged upload, read back chunk by chunk in sorted order."""
    out: dict[str, list] = {}
    for start, stop in staged.chunks():
        batch = staged.batch(start, stop)
        for name, value in rows_of(batch).items():
            if value is not None:  # a column the whole upload lacks is None in every chunk
                out.setdefault(name, []).extend(value)
    return out


def rows_of(batch) -> dict[str, list]:
    """A StepBatch's per-step values as lists (bytes of float arrays, so equal means equal)."""
    out = {
        "rollout": [batch.rollout_keys[i] for i in batch.rollout_index],
        "step": batch.step.tolist(),
        "time_s": batch.time_s.tolist(),
        "control": batch.control.tolist(),
        "features": [row.tobytes() for row in batch.features],
        "scene": None if batch.scene is None else list(batch.scene),
        "image_sha256": batch.image_sha256,
    }
    for name in ("learner_action", "expert_action", "learner_probs", "learner_ensemble"):
        value = getattr(batch, name)
        if isinstance(value, Vectors):
            out[name] = [
                v.tobytes() if p else None for v, p in zip(value.values, value.present, strict=True)
            ]
        elif value is not None:
            out[name] = value.tolist()
        else:
            out[name] = None
    return out


def assert_same(path: Path, kind: str, spec, round_number: int = 1) -> None:
    whole = validate(read_table(path, kind), spec, round_number=round_number)
    staged = staging.stage_file(path, kind, spec, round_number=round_number)
    try:
        assert staged.rollout_keys == whole.rollout_keys
        in_order = np.array_equal(whole.row_number, np.arange(1, whole.n_steps + 1))
        assert (staged.within is None) == in_order  # an unsorted file was regrouped by chunk
        assert staged.robot == whole.robot
        assert staged.counts.tolist() == [s.stop - s.start for s in whole.rollout_slices()]
        expected = rows_of(whole)
        got = staged_rows(staged)
        for name, values in expected.items():
            if values is None:
                assert name not in got, name
            else:
                assert got[name] == values, name
        assert staged.ensemble_size == whole.ensemble_size
        assert staged.rollout_hashes() == service.rollout_hashes(whole)
        assert service.rollout_hashes(whole) == defined_hashes(whole)
    finally:
        staged.close()
    assert not staged.folder.exists()


def defined_hashes(batch) -> list[str]:
    """Each rollout's content hash from its definition (docs/references.md, "Rollout content
    hash"): SHA-256 (hashlib) of the rollout's steps' bytes, column after column."""
    out = []
    for rows in batch.rollout_slices():
        h = hashlib.sha256()
        h.update(batch.step[rows].astype("<i8").tobytes())
        h.update(batch.time_s[rows].astype("<f8").tobytes())
        h.update(batch.control[rows].astype("i1").tobytes())
        h.update(batch.features[rows].astype("<f4").tobytes())
        for name in (
            "learner_action",
            "expert_action",
            "learner_probs",
            "learner_ensemble",
            "learner_std",
        ):
            value = getattr(batch, name)
            if isinstance(value, Vectors):
                h.update(value.values[rows].astype("<f4").tobytes())
                h.update(value.present[rows].astype("?").tobytes())
            elif value is not None:
                h.update(value[rows].astype("<i4").tobytes())
        if batch.scene is not None:
            for text in batch.scene[rows]:
                h.update(b"\x00" if text is None else hashlib.sha256(text.encode()).digest())
        if batch.image is not None:
            for image in batch.image[rows]:
                h.update(b"\x00" if image is None else hashlib.sha256(image).digest())
        out.append(h.hexdigest())
    return out


@pytest.mark.parametrize("kind", ["parquet", "jsonl"])
@pytest.mark.parametrize("order", ["sorted", "unsorted"])
def test_a_file_in_many_batches_stages_what_the_whole_file_path_holds(
    tmp_path, small_batches, kind, order
):
    cols = discrete_columns()
    if order == "sorted":
        keys = sorted(
            range(len(cols["rollout"])), key=lambda i: (cols["rollout"][i], cols["step"][i])
        )
        cols = {k: [v[i] for i in keys] for k, v in cols.items()}
    else:
        cols = shuffled(cols)
    path = write(tmp_path, cols, kind)
    assert_same(path, kind, spec_of(DISCRETE_SPEC))


def test_rows_in_key_order_but_keys_out_of_order_are_sorted(tmp_path, small_batches):
    cols = discrete_columns(n_rollouts=4)  # each rollout's steps in order, the keys not
    assert cols["rollout"] != sorted(cols["rollout"])
    assert_same(write(tmp_path, cols, "parquet"), "parquet", spec_of(DISCRETE_SPEC))


def test_columns_that_first_appear_in_a_late_batch(tmp_path, small_batches):
    """JSON Lines: the first lines leave out the ensemble, scene, image and robot columns."""
    cols = discrete_columns(n_rollouts=3)
    for name in ("learner_ensemble", "scene", "image", "robot"):
        cols[name] = [None] * 15 + cols[name][15:]
    assert_same(write(tmp_path, cols, "jsonl"), "jsonl", spec_of(DISCRETE_SPEC))


def test_a_column_missing_everywhere_is_as_if_absent(tmp_path, small_batches):
    cols = discrete_columns(n_rollouts=2)
    cols["control"] = ["expert"] * len(cols["control"])
    cols["expert_action"] = [ACTIONS[0]] * len(cols["control"])
    cols["learner_action"] = [None] * len(cols["control"])
    cols["learner_probs"] = [None] * len(cols["control"])
    cols["learner_ensemble"] = [None] * len(cols["control"])
    cols["image"] = [None] * len(cols["control"])
    table = pa.table(cols)
    path = tmp_path / "rows.parquet"
    pq.write_table(table, path, row_group_size=4)
    assert_same(path, "parquet", spec_of(DISCRETE_SPEC))


def test_a_continuous_file_with_ensembles_from_a_late_batch(tmp_path, small_batches):
    rng = np.random.default_rng(5)
    n = 40
    rollout = [f"c{(i // 10) % 2}-{i // 20}" for i in range(n)]
    step = [i % 10 + 10 * ((i // 20) == 0) for i in range(n)]
    action = rng.uniform([0, -0.2], [2, 0.2], size=(n, 2)).astype(np.float32)
    cols = {
        "rollout": rollout,
        "step": step,
        "time_s": [0.1 * s for s in step],
        "features": rng.normal(size=(n, 2)).tolist(),
        "learner_action": [None if i % 5 == 0 else action[i].tolist() for i in range(n)],
        "learner_ensemble": [None if i < 23 else [action[i].tolist()] * 3 for i in range(n)],
        "learner_std": [None if i % 7 == 0 else [0.1, 0.01] for i in range(n)],
        "control": ["expert" if i % 5 == 0 else "learner" for i in range(n)],
        "expert_action": [[1.0, 0.0] if i % 5 == 0 else None for i in range(n)],
    }
    path = tmp_path / "rows.parquet"
    pq.write_table(pa.table(cols), path, row_group_size=6)
    assert_same(path, "parquet", spec_of(CONTINUOUS_SPEC))


@pytest.mark.parametrize("fortran", [False, True])
def test_npz_members_read_in_row_slices(tmp_path, small_batches, fortran):
    rng = np.random.default_rng(2)
    n = 37
    features = rng.normal(size=(n, 3)).astype(np.float32)
    arrays = {
        "rollout": np.array([f"n{i % 3}" for i in range(n)]),
        "step": np.arange(n) // 3,
        "time_s": (np.arange(n) // 3) * 0.1,
        "features": np.asfortranarray(features) if fortran else features,
        "learner_action": np.where(np.arange(n) % 4 == 0, -1, np.arange(n) % 3),
        "robot": np.array([f"amr-{i % 2}" for i in range(n)]),
    }
    sink = io.BytesIO()
    np.savez_compressed(sink, **arrays)
    path = tmp_path / "rows.npz"
    path.write_bytes(sink.getvalue())
    tables = list(stream_read.iter_tables(path, "npz"))
    assert len(tables) > 3
    assert pa.concat_tables(tables).equals(read_table(path, "npz"))
    assert_same(path, "npz", spec_of(DISCRETE_SPEC))


def test_parquet_read_in_batches_equals_the_whole_table(tmp_path, small_batches):
    cols = discrete_columns()
    path = write(tmp_path, cols, "parquet", row_group=1000)  # one row group: still batched
    tables = list(stream_read.iter_tables(path, "parquet"))
    assert len(tables) > 3 and max(t.num_rows for t in tables) <= 7
    assert pa.concat_tables(tables).equals(read_table(path, "parquet"))


# ---- a Parquet file with one column per feature, read a group of columns at a time


def per_feature(cols: dict[str, list]) -> dict[str, list]:
    """The rows with one column per loop feature (gap_m, speed, occluded) instead of `features`;
    the features between the other columns, so a column group holds both kinds."""
    names = [f["name"] for f in DISCRETE_SPEC["features"]]
    out = {k: v for k, v in cols.items() if k != "features"}
    for j, name in enumerate(names):
        out[name] = [None if row is None else row[j] for row in cols["features"]]
    order = ["rollout", "step", names[0], "time_s", names[1], "control", names[2]]
    return {k: out[k] for k in order + [k for k in out if k not in order]}


@pytest.fixture
def column_groups(monkeypatch):
    """Column readers may hold 1 byte together: every column is a group of its own."""
    monkeypatch.setattr(stream_read, "PARQUET_READERS_BYTES", 1)


@pytest.mark.parametrize("order", ["sorted", "unsorted"])
def test_a_parquet_file_read_a_group_of_columns_at_a_time_stages_what_the_whole_file_holds(
    tmp_path, small_batches, column_groups, order
):
    cols = per_feature(discrete_columns(n_rollouts=6, steps=11))
    cols = shuffled(cols) if order == "unsorted" else cols
    path = write(tmp_path, cols, "parquet", row_group=25)  # three row groups, the last short
    groups = stream_read._column_groups(pq.ParquetFile(path))
    assert groups == [[name] for name in cols]
    tables = list(stream_read.iter_tables(path, "parquet"))
    assert len(tables) > 9 and max(t.num_rows for t in tables) <= 7
    assert pa.concat_tables(tables).equals(read_table(path, "parquet"))
    assert_same(path, "parquet", spec_of(DISCRETE_SPEC))
    assert sorted(p.name for p in tmp_path.iterdir()) == [path.name]  # nothing spilled is left


def test_a_refusal_in_a_file_read_by_column_groups_leaves_nothing_spilled(
    tmp_path, small_batches, column_groups
):
    cols = per_feature(discrete_columns(n_rollouts=6, steps=11))
    cols["speed"][52] = float("nan")
    path = write(tmp_path, cols, "parquet", row_group=40)
    spec = spec_of(DISCRETE_SPEC)
    with pytest.raises(InvalidInput) as whole:
        validate(read_table(path, "parquet"), spec, round_number=1)
    with pytest.raises(InvalidInput) as staged:
        staging.stage_file(path, "parquet", spec, round_number=1)
    assert str(staged.value) == str(whole.value) and "row 53" in str(whole.value)
    assert sorted(p.name for p in tmp_path.iterdir()) == [path.name]


def test_columns_of_one_name_are_read_together_and_refused_as_the_whole_file_refuses_them(
    tmp_path, small_batches, column_groups
):
    cols = per_feature(discrete_columns(n_rollouts=2, steps=5))
    table = pa.table(cols)
    table = table.append_column("speed", table["speed"])  # "speed" twice, apart
    path = tmp_path / "twice.parquet"
    pq.write_table(table, path, row_group_size=4)
    groups = stream_read._column_groups(pq.ParquetFile(path))
    assert sum(g.count("speed") for g in groups) == 1
    spec = spec_of(DISCRETE_SPEC)
    with pytest.raises(InvalidInput) as whole:
        validate(read_table(path, "parquet"), spec, round_number=1)
    with pytest.raises(InvalidInput) as staged:
        staging.stage_file(path, "parquet", spec, round_number=1)
    assert str(staged.value) == str(whole.value) == "column 'speed' appears more than once"


def wide_file(path: Path, rows: int, n_features: int = 300) -> Path:
    """One row group of float32 columns f0, f1, ... (pyarrow's defaults otherwise)."""
    rng = np.random.default_rng(0)
    step = np.arange(rows) % 500
    cols = {
        "rollout": pa.array([f"w{i // 500:04d}" for i in range(rows)]),
        "step": pa.array(step),
        "time_s": pa.array(step * 0.1),
    }
    for j in range(n_features):
        cols[f"f{j}"] = pa.array(rng.standard_normal(rows, dtype=np.float32))
    pq.write_table(pa.table(cols), path, row_group_size=rows)
    return path


def held_while_read(path: Path) -> int:
    """The most Arrow memory (pyarrow's pool: the column readers' pages and dictionaries, and
    the tables) held above the start whenever the reader gives a table."""
    pool = pa.default_memory_pool()
    start, most = pool.bytes_allocated(), 0
    for _ in stream_read.iter_tables(path, "parquet"):
        most = max(most, pool.bytes_allocated() - start)
    return most


# The column readers together may hold 2 MB; a table is about BATCH_BYTES (4 MB).
WIDE_READERS_BYTES = 2 << 20
WIDE_HELD_BOUND = 12 << 20


def test_memory_reading_a_wide_file_in_one_row_group_does_not_grow_with_its_rows(
    tmp_path, monkeypatch
):
    """300 feature columns in one row group: read all at once, every column's reader holds its
    pages and dictionary together (here 22 MB at 4,000 rows, 91 MB at 32,000); read a group of
    columns at a time, the same few MB at any length."""
    small = wide_file(tmp_path / "small.parquet", 4_000)
    large = wide_file(tmp_path / "large.parquet", 32_000)
    monkeypatch.setattr(stream_read, "PARQUET_READERS_BYTES", WIDE_READERS_BYTES)
    assert len(stream_read._column_groups(pq.ParquetFile(large))) > 4
    held_small, held_large = held_while_read(small), held_while_read(large)
    monkeypatch.setattr(stream_read, "PARQUET_READERS_BYTES", 1 << 40)  # one group: all at once
    assert len(stream_read._column_groups(pq.ParquetFile(large))) == 1
    held_at_once = held_while_read(large)
    print(
        f"Arrow memory held reading 300 columns: 4,000 rows {held_small / 1e6:.1f} MB, "
        f"32,000 rows {held_large / 1e6:.1f} MB; 32,000 rows at once {held_at_once / 1e6:.1f} MB"
    )
    assert held_large < 1.25 * held_small
    assert held_small < WIDE_HELD_BOUND and held_large < WIDE_HELD_BOUND < held_at_once
