"""The stored Parquet file of each version: written at creation, served byte for byte, checked.

A full Parquet export must be the same bytes whether it is read from the version's stored file or
rebuilt from the store; a damaged file must never complete a download; a folder that refuses the
file must not stop exports.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import time
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import select, text

from expertloop.client import Client
from expertloop.loops.models import Loop
from expertloop.snapshots import export, files, service
from expertloop.snapshots.files import StoredFileDamaged
from expertloop.snapshots.models import Snapshot
from expertloop.snapshots.service import SnapshotChanged
from tests.snapshots.conftest import BASE, SLUG

EXPORT = f"{BASE}/snapshots/v1/export"


def _create(client, headers) -> dict:
    made = client.post(f"{BASE}/snapshots", json={}, headers=headers)
    assert made.status_code == 201, made.text
    return made.json()


def _stored(settings) -> list[Path]:
    return sorted(settings.snapshot_dir.rglob(f"*{files.SUFFIX}"))


def _leftovers(settings) -> list[Path]:
    return sorted(settings.snapshot_dir.rglob(f"*{files.SPOOL_SUFFIX}"))


def test_creation_stores_the_export_and_the_file_equals_a_rebuild(
    client, settings, discrete_loop, trainer
):
    snapshot = _create(client, trainer)
    [path] = _stored(settings)
    assert path.name.startswith("v1-")
    from_file = client.get(EXPORT, headers=trainer)
    assert from_file.status_code == 200
    assert from_file.headers["content-length"] == str(path.stat().st_size)
    assert from_file.content == path.read_bytes()
    # the hash beside the file is the file's own SHA-256
    assert files.stored(path) == (
        path.stat().st_size,
        hashlib.sha256(path.read_bytes()).hexdigest(),
    )

    files.discard(path)
    rebuilt = client.get(EXPORT, headers=trainer)
    assert rebuilt.status_code == 200 and "content-length" not in rebuilt.headers
    assert rebuilt.content == from_file.content  # the store gives the very same bytes
    assert _stored(settings) == [path]  # and the rebuild stored the file again on its way
    assert pq.read_table(io.BytesIO(rebuilt.content)).num_rows == snapshot["row_count"]
    assert _leftovers(settings) == []


def test_a_damaged_file_never_completes_a_download_and_is_rebuilt(
    client, settings, discrete_loop, trainer
):
    _create(client, trainer)
    [path] = _stored(settings)
    good = path.read_bytes()
    damaged = bytearray(good)
    damaged[len(damaged) // 2] ^= 0xFF  # same size, one byte flipped
    path.write_bytes(bytes(damaged))
    with pytest.raises(StoredFileDamaged, match="no longer matches"):
        client.get(EXPORT, headers=trainer)
    assert not path.exists()
    again = client.get(EXPORT, headers=trainer)
    assert again.status_code == 200 and again.content == good
    assert path.read_bytes() == good


def test_a_tampered_store_cannot_change_a_stored_version_and_cuts_off_a_rebuild(
    client, settings, engine, discrete_loop, trainer
):
    _create(client, trainer)
    [path] = _stored(settings)
    good = path.read_bytes()
    with engine.begin() as conn:
        conn.execute(text("UPDATE steps SET features = :f WHERE id = 1"), {"f": b"\x00" * 12})
    assert client.get(EXPORT, headers=trainer).content == good  # the version as it was made
    files.discard(path)
    with pytest.raises(SnapshotChanged, match="v1"):
        client.get(EXPORT, headers=trainer)
    assert _stored(settings) == [] and _leftovers(settings) == []  # nothing wrong was stored


def test_a_folder_that_refuses_the_file_does_not_stop_exports(
    client, settings, discrete_loop, trainer, caplog
):
    settings.data_dir.mkdir(parents=True, exist_ok=True)
    settings.snapshot_dir.write_text("not a folder")  # mkdir of loop-N below it must fail
    snapshot = _create(client, trainer)
    assert "cannot store the export file" in caplog.text
    for _ in range(2):
        got = client.get(EXPORT, headers=trainer)
        assert got.status_code == 200
        assert pq.read_table(io.BytesIO(got.content)).num_rows == snapshot["row_count"]


def test_the_file_name_follows_the_manifest(tmp_path):
    """A store recreated under the same data folder cannot be served another store's file."""
    first = Snapshot(loop_id=1, version=1, manifest={"content_sha256": "a", "created_at": "1"})
    remade = Snapshot(loop_id=1, version=1, manifest={"content_sha256": "a", "created_at": "2"})
    assert files.parquet_path(tmp_path, first) != files.parquet_path(tmp_path, remade)
    assert files.parquet_path(tmp_path, first) == files.parquet_path(tmp_path, first)


def _store(content: bytes, target: Path) -> None:
    spool = files.Spool(target.parent, prefix="new.")
    spool.write(content)
    assert spool.keep(target)


def test_a_spool_is_seen_only_once_kept(tmp_path):
    folder = tmp_path / "loop-1"
    target = folder / "v1-x.parquet"
    spool = files.Spool(folder, prefix=target.name + ".")
    spool.write(b"a" * 10)
    assert files.stored(target) is None and not target.exists()
    spool.discard()  # the stream it was written from was abandoned
    assert list(folder.iterdir()) == []
    spool = files.Spool(folder, prefix="new.")
    for piece in (b"a", b"b"):
        spool.write(piece)
    assert spool.keep(target)
    assert target.read_bytes() == b"ab"
    assert list(files.read_chunks(target, hashlib.sha256(b"ab").hexdigest())) == [b"ab"]
    assert sorted(p.name for p in folder.iterdir()) == [target.name, target.name + ".sha256"]


def test_an_abandoned_rebuild_stores_nothing(app, client, settings, discrete_loop, trainer):
    _create(client, trainer)
    [path] = _stored(settings)
    files.discard(path)
    with app.state.session_factory() as session:
        loop = session.scalar(select(Loop).where(Loop.slug == SLUG))
        snapshot = service.get_snapshot(session, loop=loop, version="v1")
        exported = service.export_chunks(
            loop=loop,
            snapshot=snapshot,
            since=None,
            file_format="parquet",
            spool_dir=settings.data_dir / "exports",
            files_dir=settings.snapshot_dir,
            sessions=app.state.session_factory,
        )
        assert next(exported.chunks).startswith(b"PAR1")
        exported.chunks.close()  # the client went away
    assert _stored(settings) == [] and _leftovers(settings) == []


def test_the_last_piece_waits_for_the_hash(tmp_path, monkeypatch):
    monkeypatch.setattr(files, "READ_BYTES", 4)
    target = tmp_path / "v1-x.parquet"
    content = bytes(range(10))
    _store(content, target)
    assert list(files.read_chunks(target, hashlib.sha256(content).hexdigest())) == [
        content[0:4],
        content[4:8],
        content[8:10],
    ]
    target.write_bytes(content[:9] + b"\xff")  # the footer's last byte changed
    sent = []
    with pytest.raises(StoredFileDamaged):
        for piece in files.read_chunks(target, hashlib.sha256(content).hexdigest()):
            sent.append(piece)
    assert b"".join(sent) == content[:8]  # the damaged last piece never left
    assert files.stored(target) is None and not target.exists()


def test_a_starting_server_sweeps_day_old_spools_of_a_crashed_writer(app, settings):
    folder = settings.snapshot_dir / "loop-1"
    folder.mkdir(parents=True)
    stale = folder / f"v1-x.parquet.abc{files.SPOOL_SUFFIX}"
    fresh = folder / f"v1-x.parquet.def{files.SPOOL_SUFFIX}"
    kept = folder / "v1-x.parquet"
    for path in (stale, fresh, kept):
        path.write_bytes(b"x")
    day_ago = time.time() - 2 * 24 * 3600
    os.utime(stale, (day_ago, day_ago))
    os.utime(kept, (day_ago, day_ago))
    with TestClient(app):
        pass
    assert not stale.exists() and fresh.exists() and kept.exists()


def test_the_client_learns_the_size_of_a_stored_file_before_the_bytes(
    client, settings, discrete_loop, trainer, tmp_path
):
    _create(client, trainer)
    [path] = _stored(settings)
    token = trainer["Authorization"].split(" ", 1)[1]
    sizes: list[int] = []
    received: list[int] = []
    with Client("http://testserver", token, transport=client._transport) as api:
        api.export(
            SLUG, tmp_path / "a.parquet", size=sizes.append, progress=lambda n: received.append(n)
        )
        files.discard(path)  # rebuilt from the store: the size is not known beforehand
        api.export(SLUG, tmp_path / "b.parquet", size=sizes.append)
    assert sizes == [path.stat().st_size] and sum(received) == sizes[0]
    assert (tmp_path / "a.parquet").read_bytes() == (tmp_path / "b.parquet").read_bytes()


def test_the_file_has_the_bytes_of_pyarrows_own_writer(client, settings, discrete_loop, trainer):
    """The file is written with its manifest added to the footer after the last row group;
    pyarrow's ParquetWriter, given the schema with the manifest up front and the same row
    groups, writes the very same bytes (docs/references.md, "Parquet footer metadata")."""
    snapshot = _create(client, trainer)
    [path] = _stored(settings)
    parquet = pq.ParquetFile(path)
    metadata = {"manifest": snapshot["manifest"], "since": None}
    assert json.loads(parquet.schema_arrow.metadata[b"expertloop"]) == metadata
    # the export's columns as the README lists them (3 features, a discrete action)
    schema = pa.schema(
        [
            ("step_id", pa.int64()),
            ("features", pa.list_(pa.float32(), 3)),
            ("expert_action", pa.int64()),
            ("round", pa.int64()),
            ("source", pa.string()),
            ("learner_version", pa.string()),
            ("rollout", pa.string()),
            ("step", pa.int64()),
            ("label_count", pa.int64()),
            ("agreement", pa.float64()),
        ],
        metadata={"expertloop": json.dumps(metadata, sort_keys=True)},
    )
    sink = io.BytesIO()
    with pq.ParquetWriter(
        sink,
        schema,
        compression=export.PARQUET_COMPRESSION,
        use_dictionary=export.PARQUET_DICTIONARY_COLUMNS,
    ) as writer:
        for group in range(parquet.metadata.num_row_groups):
            writer.write_table(parquet.read_row_group(group).cast(schema))
    assert sink.getvalue() == path.read_bytes()
