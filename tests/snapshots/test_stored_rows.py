""".npz, JSON Lines and incremental exports decoded from the versions' stored Parquet files.

What must hold (app/snapshots/stored_rows.py): while a version's file is there, these exports
read it, not the store, and hold the same rows as the file (read back by pyarrow, a reader not
ours); an incremental export mixes a stored side and a store side when only one file is there; a
damaged file never completes an export, is deleted, and the next export reads the store; a file
deleted while it is read is still read whole; many exports at once get the same bytes.
"""

from __future__ import annotations

import io
import zipfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from expertloop.loops.spec import LoopSpec, parse_spec
from expertloop.shared import training_set as ts
from expertloop.shared.arrow_columns import dictionary_codes, fixed_width_floats, numbers
from expertloop.snapshots import export, files, stored_rows
from expertloop.snapshots.files import StoredFileDamaged
from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC
from tests.snapshots.conftest import BASE
from tests.snapshots.reference import as_tuples
from tests.snapshots.test_export import _get, _labels, _second_version, _snapshot, rows_of

DERIVED = ("npz", "jsonl")


def _file_of(settings, version: int) -> Path:
    [path] = settings.snapshot_dir.rglob(f"v{version}-*.parquet")
    return path


def _file_rows(path: Path, tmp_path: Path) -> set:
    return as_tuples(rows_of(path.read_bytes(), "parquet", tmp_path))


@pytest.fixture
def two_versions(client, discrete_loop, labeller, trainer, uploader, monkeypatch):
    """v1 and v2 of the discrete loop, in row groups of 2 rows (many batches, many merges)."""
    monkeypatch.setattr(ts, "DEFAULT_BATCH", 2)
    steps = _labels(labeller)
    _snapshot(client, trainer, up_to_round=1)
    _second_version(client, labeller, trainer, uploader, steps)


def _refuse(*args, **kwargs):
    raise AssertionError("the store was read")


def test_derived_exports_read_the_files_not_the_store(
    client, settings, trainer, two_versions, tmp_path, monkeypatch
):
    rows_1 = _file_rows(_file_of(settings, 1), tmp_path)
    rows_2 = _file_rows(_file_of(settings, 2), tmp_path)
    monkeypatch.setattr(ts, "iter_batches", _refuse)
    for fmt in DERIVED:
        for version, rows in (("v1", rows_1), ("v2", rows_2)):
            got = rows_of(_get(client, trainer, version, format=fmt), fmt, tmp_path)
            assert as_tuples(got) == rows, (fmt, version)
        for fmt_since in (fmt, "parquet"):
            since = _get(client, trainer, "v2", format=fmt_since, since="v1")
            assert as_tuples(rows_of(since, fmt_since, tmp_path)) == rows_2 - rows_1
    assert len(rows_2 - rows_1) == 3


@pytest.mark.parametrize("missing", [1, 2])
def test_an_incremental_export_mixes_a_stored_side_and_a_store_side(
    client, settings, trainer, two_versions, tmp_path, missing
):
    rows_1 = _file_rows(_file_of(settings, 1), tmp_path)
    rows_2 = _file_rows(_file_of(settings, 2), tmp_path)
    _file_of(settings, missing).unlink()
    for fmt in ("parquet", *DERIVED):
        since = rows_of(_get(client, trainer, "v2", format=fmt, since="v1"), fmt, tmp_path)
        assert as_tuples(since) == rows_2 - rows_1, fmt
    # an incremental export stores nothing: only a full Parquet pull writes the file again
    assert len(list(settings.snapshot_dir.rglob("*.parquet"))) == 1


def _flip_middle(path: Path) -> None:
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0xFF
    path.write_bytes(bytes(data))


def _cut_short(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - 100])  # the footer is gone: the file cannot be decoded


@pytest.mark.parametrize("damage", [_flip_middle, _cut_short])
@pytest.mark.parametrize("fmt", DERIVED)
def test_a_damaged_file_never_completes_a_derived_export(
    client, settings, trainer, two_versions, tmp_path, damage, fmt
):
    path = _file_of(settings, 2)
    good = _file_rows(path, tmp_path)
    damage(path)
    with pytest.raises(StoredFileDamaged, match="no longer matches"):
        client.get(f"{BASE}/snapshots/v2/export", params={"format": fmt}, headers=trainer)
    assert not path.exists()
    again = rows_of(_get(client, trainer, "v2", format=fmt), fmt, tmp_path)  # from the store
    assert as_tuples(again) == good


@pytest.mark.parametrize("damaged", [1, 2])
def test_a_damaged_file_on_either_side_never_completes_an_incremental_export(
    client, settings, trainer, two_versions, tmp_path, damaged
):
    rows_1 = _file_rows(_file_of(settings, 1), tmp_path)
    rows_2 = _file_rows(_file_of(settings, 2), tmp_path)
    path = _file_of(settings, damaged)
    _flip_middle(path)
    export_v2 = f"{BASE}/snapshots/v2/export"
    with pytest.raises(StoredFileDamaged, match="no longer matches"):
        client.get(export_v2, params={"since": "v1"}, headers=trainer)
    assert not path.exists()
    again = rows_of(_get(client, trainer, "v2", since="v1"), "parquet", tmp_path)
    assert as_tuples(again) == rows_2 - rows_1  # the damaged side read from the store


def _opened(settings, version: int) -> stored_rows.StoredRows:
    path = _file_of(settings, version)
    found = files.stored(path)
    assert found is not None
    return stored_rows.StoredRows(path, found[1], _spec(DISCRETE_SPEC))


def _spec(loop: dict) -> LoopSpec:
    return parse_spec(loop["features"], loop["action_space"])


def test_the_last_batch_waits_for_the_files_hash(settings, two_versions):
    path = _file_of(settings, 2)
    groups = pq.ParquetFile(path).num_row_groups
    assert groups >= 3
    _flip_middle(path)  # the flip lands in the values of a row group that still decodes
    opened = _opened(settings, 2)
    given = 0
    with pytest.raises(StoredFileDamaged):
        for _ in opened.batches():
            given += 1
    opened.close()
    assert given < groups
    assert not path.exists()


def test_a_file_deleted_while_it_is_read_is_read_whole(settings, two_versions, tmp_path):
    path = _file_of(settings, 2)
    expected = pq.read_table(path)
    opened = _opened(settings, 2)
    batches = opened.batches()
    first = next(batches)
    path.unlink()
    rest = list(batches)
    opened.close()
    step_ids = np.concatenate([first.step_id, *(b.step_id for b in rest)])
    assert step_ids.tolist() == expected.column("step_id").to_pylist()
    assert stored_rows.open_stored(path, _spec(DISCRETE_SPEC)) is None  # the store has the rows


def test_many_derived_exports_at_once_get_the_same_bytes(client, trainer, two_versions):
    asks = [("npz", None), ("jsonl", None), ("npz", "v1"), ("jsonl", "v1")] * 4

    def pull(ask: tuple[str, str | None]) -> bytes:
        fmt, since = ask
        params = {"format": fmt} | ({"since": since} if since else {})
        got = client.get(f"{BASE}/snapshots/v2/export", params=params, headers=trainer)
        assert got.status_code == 200, got.text
        return got.content

    with ThreadPoolExecutor(max_workers=8) as pool:
        answers = list(pool.map(pull, asks))
    for ask, answer in zip(asks, answers, strict=True):
        assert answer == answers[asks.index(ask)], ask
    assert len(set(answers)) == 4


# --- the Arrow-to-numpy readers, against pyarrow's own conversion to Python values ----------


def test_continuous_rows_round_trip_through_a_file(tmp_path):
    """RowBatch -> our Parquet writer -> our reader gives the batch back (continuous actions,
    a round without a learner version, rollouts named by key)."""
    spec = _spec(CONTINUOUS_SPEC)
    rng = np.random.default_rng(7)
    n = 50
    batch = ts.RowBatch(
        step_id=np.arange(10, 10 + n, dtype=np.int64),
        source=rng.integers(0, 3, n).astype(np.int8),
        action=rng.normal(size=(n, spec.action_width)).astype(np.float32),
        label_count=rng.integers(1, 4, n),
        agreement=rng.random(n),
        round=np.repeat([0, 1], n // 2).astype(np.int64),
        rollout_id=rng.integers(100, 104, n).astype(np.int64),
        step_index=rng.integers(0, 500, n).astype(np.int64),
        features=rng.normal(size=(n, spec.n_features)).astype(np.float32),
        rollout_keys={100: "a", 101: "b", 102: "c", 103: "d"},
        learner_versions={0: None, 1: "learner-7"},
    )
    rows = export.ParquetRows(spec)
    data = rows.write(batch) + rows.close({"manifest": {}})
    table = pq.read_table(io.BytesIO(data), read_dictionary=list(stored_rows.TEXT_COLUMNS))
    [back] = [stored_rows._as_batch(table, spec, with_features=True)]
    for name in ("step_id", "source", "action", "label_count", "agreement", "round"):
        np.testing.assert_array_equal(getattr(back, name), getattr(batch, name), err_msg=name)
    np.testing.assert_array_equal(back.features, batch.features)
    np.testing.assert_array_equal(back.step_index, batch.step_index)
    assert back.rollout().tolist() == batch.rollout().tolist()
    assert back.learner_version().tolist() == batch.learner_version().tolist()


def test_arrow_readers_agree_with_pyarrow_and_refuse_what_they_cannot_read():
    ints = pa.array([5, -3, 7, 9], type=pa.int32()).slice(1)
    assert numbers(ints, np.int64).tolist() == ints.to_pylist()
    vectors = pa.array([[1, 2], [3, 4], [5, 6]], type=pa.list_(pa.float32(), 2)).slice(1)
    assert fixed_width_floats(vectors, 2).tolist() == vectors.to_pylist()
    names = pa.array(["x", None, "y", "x"]).dictionary_encode()
    codes, values = dictionary_codes(names, missing=True)
    assert [values[c] if c >= 0 else None for c in codes] == names.to_pylist()
    with pytest.raises(ValueError, match="rollout has 1 missing values"):
        dictionary_codes(names, name="rollout")  # a column every row must have
    with pytest.raises(ValueError, match="missing values"):
        numbers(pa.array([1, None]), np.int64)
    with pytest.raises(ValueError, match="not numbers"):
        numbers(pa.array(["1"]), np.int64)
    with pytest.raises(ValueError, match="not integers"):
        numbers(pa.array([1.5]), np.int64, integers=True)
    with pytest.raises(ValueError, match="lists of 3 float32"):
        fixed_width_floats(vectors, 3)
    with pytest.raises(ValueError, match="missing values"):
        fixed_width_floats(pa.array([[1, 2], None], type=pa.list_(pa.float32(), 2)), 2)


# --- .npz from a stored file, a column at a time ------------------------------------------


def _npz_of_file(data: bytes, spec: LoopSpec, tmp_path: Path, metadata: dict) -> bytes:
    """The column-at-a-time .npz of a Parquet file's bytes, stored as a version's file is."""
    path = tmp_path / "v1-file.parquet"
    spool = files.Spool(tmp_path, prefix="v1.")
    spool.write(data)
    spool.keep(path)
    found = files.stored(path)
    assert found is not None
    opened = stored_rows.StoredRows(path, found[1], spec)
    try:
        return b"".join(opened.npz(metadata))
    finally:
        opened.close()


def _refuse_spooling(*args, **kwargs):
    raise AssertionError("an .npz from a stored file spooled its rows")


@pytest.mark.parametrize("loop", [DISCRETE_SPEC, CONTINUOUS_SPEC], ids=["discrete", "continuous"])
def test_an_npz_read_a_column_at_a_time_is_the_npz_of_its_rows(tmp_path, monkeypatch, loop):
    """The archive made from the file's columns is byte for byte the one the batch writer makes
    of the same rows (text widths, the rows' order, a round without a learner version, several
    row groups with their own dictionaries), and numpy reads the rows back (the reference)."""
    spec = _spec(loop)
    rng = np.random.default_rng(11)
    longest = max(ts.SOURCES, key=len)
    shorter = [i for i, name in enumerate(ts.SOURCES) if len(name) < len(longest)]
    rows = export.ParquetRows(spec)
    batches = []
    data = b""
    start = 0
    for n, rollouts in ((7, {3: "short", 4: "a-much-longer-rollout-key"}), (5, {9: "mid-key"})):
        ids = list(rollouts)
        batch = ts.RowBatch(
            step_id=np.arange(start, start + n, dtype=np.int64),
            # never the longest source name: its member is as wide as that name all the same
            source=rng.choice(shorter, n).astype(np.int8),
            action=(
                rng.integers(0, len(loop["action_space"].get("actions", [0])), n)
                if spec.is_discrete
                else rng.normal(size=(n, spec.action_width)).astype(np.float32)
            ),
            label_count=rng.integers(1, 4, n),
            agreement=rng.random(n),
            round=np.sort(rng.integers(0, 3, n)).astype(np.int64),
            rollout_id=rng.choice(ids, n).astype(np.int64),
            step_index=rng.integers(0, 500, n).astype(np.int64),
            features=rng.normal(size=(n, spec.n_features)).astype(np.float32),
            rollout_keys=rollouts,
            learner_versions={0: None, 1: "learner-7", 2: "learner-8b"},
        )
        batches.append(batch)
        data += rows.write(batch)
        start += n
    data += rows.close({"manifest": {}})
    metadata = {"manifest": {"rows": start}}
    expected = b"".join(export.npz_chunks(iter(batches), spec, metadata, tmp_path))
    monkeypatch.setattr(export, "_SpooledColumn", _refuse_spooling)
    got = _npz_of_file(data, spec, tmp_path, metadata)
    assert got == expected
    with np.load(io.BytesIO(got)) as archive:
        np.testing.assert_array_equal(
            archive["features"], np.concatenate([b.features for b in batches])
        )
        assert archive["rollout"].tolist() == [r for b in batches for r in b.rollout().tolist()]
        assert archive["learner_version"].tolist() == [
            v or "" for b in batches for v in b.learner_version().tolist()
        ]


def _flip_in_last_features(path: Path) -> None:
    """Damage the last row group's features: the members before them are given first."""
    metadata = pq.ParquetFile(path).metadata
    last = metadata.row_group(metadata.num_row_groups - 1)
    [chunk] = [
        last.column(i)
        for i in range(last.num_columns)
        if last.column(i).path_in_schema.startswith("features")
    ]
    data = bytearray(path.read_bytes())
    data[chunk.data_page_offset + chunk.total_compressed_size // 2] ^= 0xFF
    path.write_bytes(bytes(data))


def test_the_npz_of_a_damaged_file_never_gets_its_end(settings, two_versions, monkeypatch):
    monkeypatch.setattr(export, "_PIECE_BYTES", 1)  # a piece per part: the small file's too
    path = _file_of(settings, 2)
    _flip_in_last_features(path)
    opened = _opened(settings, 2)
    given = []
    with pytest.raises(StoredFileDamaged):
        for piece in opened.npz({"manifest": {}}):
            given.append(piece)
    opened.close()
    assert given  # the archive was under way...
    with pytest.raises(zipfile.BadZipFile):  # ...and a reader finds no end to it
        zipfile.ZipFile(io.BytesIO(b"".join(given)))
    assert not path.exists()


def test_a_full_npz_export_of_a_stored_file_spools_nothing(
    client, settings, trainer, two_versions, tmp_path, monkeypatch
):
    first = _get(client, trainer, "v2", format="npz")
    monkeypatch.setattr(export, "_SpooledColumn", _refuse_spooling)
    assert _get(client, trainer, "v2", format="npz") == first
    _file_of(settings, 2).unlink()  # from the store: rows come in batches, and are spooled
    with pytest.raises(AssertionError, match="spooled its rows"):
        client.get(f"{BASE}/snapshots/v2/export", params={"format": "npz"}, headers=trainer)


def test_the_npz_of_a_stored_file_comes_in_pieces_of_the_copy_size(
    settings, two_versions, monkeypatch
):
    """Columns decoded a row group at a time come in parts of a few bytes here; the answer's
    pieces gather them (each one is a chunk the server sends), all but the last at least
    `_PIECE_BYTES` long."""
    monkeypatch.setattr(export, "_PIECE_BYTES", 512)
    opened = _opened(settings, 2)
    try:
        pieces = list(opened.npz({"manifest": {}}))
    finally:
        opened.close()
    assert len(pieces) > 2
    assert all(len(piece) >= 512 for piece in pieces[:-1])
    assert pq.ParquetFile(_file_of(settings, 2)).num_row_groups * 10 > len(pieces)
