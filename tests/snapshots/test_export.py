"""Exports read back by independent readers, incremental exports, the client and the CLI.

Readers: pyarrow and DuckDB for Parquet, numpy.load for .npz, the json module for JSON Lines.
Expected rows come from tests/snapshots/reference.py (plain SQL, Counter majority vote,
statistics.median), never from app code.
"""

from __future__ import annotations

import io
import json
from dataclasses import replace
from pathlib import Path
from typing import Any

import duckdb
import httpx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlalchemy import select, text
from typer.testing import CliRunner

import expertloop.client as client_module
from expertloop.cli import cli
from expertloop.client import ApiError, Client
from expertloop.ingest.models import Step
from expertloop.loops.models import Loop
from expertloop.loops.spec import spec_of
from expertloop.queue.models import ANSWER_ACTION, Label
from expertloop.shared import training_rows
from expertloop.shared import training_set as ts
from expertloop.snapshots.content_hash import ContentHasher
from expertloop.snapshots.models import Snapshot
from expertloop.snapshots.service import SnapshotChanged, cutoff_of
from tests.snapshots.conftest import (
    BASE,
    LATE_ROLLOUT,
    SLUG,
    Labeller,
    build_continuous,
    read_parquet,
    upload,
)
from tests.snapshots.reference import as_tuples, reference_hash, reference_rows

FORMATS = ("parquet", "npz", "jsonl")


@pytest.fixture
def small_batches(monkeypatch):
    """Pages of 2 rows, so every export crosses many batch and merge boundaries, and rollout
    keys read one at a time, so pages need keys outside the range last read."""
    monkeypatch.setattr(ts, "DEFAULT_BATCH", 2)
    monkeypatch.setattr(training_rows, "ROLLOUT_KEY_RANGE", 1)


def _labels(labeller: Labeller) -> list[int]:
    steps = labeller.learner_steps(SLUG, 1)
    labeller.add(SLUG, steps[0], [1, 1, 2])
    labeller.add(SLUG, steps[1], [0, 2])  # tie
    labeller.add(SLUG, steps[3], [2, None])
    labeller.add(SLUG, steps[6], [0])
    return steps


def _snapshot(client, headers, slug=SLUG, **body) -> dict[str, Any]:
    response = client.post(f"/api/loops/{slug}/snapshots", json=body, headers=headers)
    assert response.status_code in (200, 201), response.text
    return response.json()


def _get(client, headers, version="v1", slug=SLUG, **params) -> bytes:
    response = client.get(
        f"/api/loops/{slug}/snapshots/{version}/export", params=params, headers=headers
    )
    assert response.status_code == 200, response.text
    return response.content


def _reference(engine, snapshot, slug=SLUG):
    manifest = snapshot["manifest"]
    return reference_rows(
        engine,
        slug=slug,
        up_to_round=snapshot["up_to_round"],
        max_step_id=manifest["cutoff"]["max_step_id"],
        max_label_id=manifest["cutoff"]["max_label_id"],
        action_space=manifest["action_space"],
    )


def rows_of(content: bytes, fmt: str, tmp_path: Path) -> list[dict[str, Any]]:
    """Rows of an export file, read by a reader that is not ours."""
    if fmt == "parquet":
        return pq.read_table(io.BytesIO(content)).to_pylist()
    if fmt == "duckdb":
        path = tmp_path / "rows.parquet"
        path.write_bytes(content)
        result = duckdb.sql(f"SELECT * FROM read_parquet('{path}') ORDER BY step_id")
        return [dict(zip(result.columns, row, strict=True)) for row in result.fetchall()]
    if fmt == "npz":
        with np.load(io.BytesIO(content), allow_pickle=False) as archive:
            arrays = {name: archive[name] for name in archive.files}
        n = len(arrays["step_id"])
        return [
            {name: arrays[name][i].tolist() for name in arrays if name != "manifest"}
            for i in range(n)
        ]
    if fmt == "jsonl":
        return [json.loads(line) for line in content.decode("utf-8").splitlines()]
    raise AssertionError(fmt)


@pytest.mark.parametrize("reader", ["parquet", "duckdb", "npz", "jsonl"])
def test_every_reader_gets_the_reference_rows(
    client, engine, discrete_loop, labeller, trainer, small_batches, reader, tmp_path
):
    _labels(labeller)
    snapshot = _snapshot(client, trainer, up_to_round=1)
    fmt = "parquet" if reader == "duckdb" else reader
    rows = rows_of(_get(client, trainer, format=fmt), reader, tmp_path)
    expected = _reference(engine, snapshot)
    assert len(rows) == snapshot["row_count"] == len(expected) == 10
    assert as_tuples(rows) == as_tuples(expected)
    assert [r["step_id"] for r in rows] == sorted(r["step_id"] for r in rows)


def test_file_metadata_carries_the_manifest(client, discrete_loop, trainer, tmp_path):
    snapshot = _snapshot(client, trainer)
    parquet = pq.ParquetFile(io.BytesIO(_get(client, trainer)))
    meta = json.loads(parquet.schema_arrow.metadata[b"expertloop"])
    assert meta["manifest"] == snapshot["manifest"] and meta["since"] is None
    assert "safety" in meta["manifest"]["safety_caution"].lower()
    with np.load(io.BytesIO(_get(client, trainer, format="npz")), allow_pickle=False) as npz:
        assert json.loads(str(npz["manifest"]))["manifest"] == snapshot["manifest"]
        assert npz["features"].dtype == np.float32 and npz["features"].shape == (7, 3)
        assert npz["expert_action"].dtype == np.int64


def test_parquet_streams_one_row_group_per_batch(
    client, discrete_loop, labeller, trainer, small_batches
):
    _labels(labeller)
    _snapshot(client, trainer, up_to_round=1)
    with client.stream("GET", f"{BASE}/snapshots/v1/export", headers=trainer) as response:
        chunks = list(response.iter_raw())
    parquet = pq.ParquetFile(io.BytesIO(b"".join(chunks)))
    assert parquet.metadata.num_rows == 10
    assert parquet.metadata.num_row_groups >= 5  # pages of 2 rows, merged
    assert max(parquet.metadata.row_group(i).num_rows for i in range(5)) <= 4


def test_continuous_loop_median_consensus_in_every_format(
    client, engine, admin, uploader, trainer, app, tmp_path
):
    slug = build_continuous(client, admin, uploader)
    labeller = Labeller(app)
    steps = labeller.learner_steps(slug, 1)
    votes = [[0.5, 0.0], [0.7, 0.05], [1.9, -0.1]]
    labeller.add(slug, steps[0], votes)
    labeller.add(slug, steps[1], [None, None])  # only unsure: unresolved
    labeller.add(slug, steps[2], [[1.0, 0.1], None])
    snapshot = _snapshot(client, trainer, slug=slug, up_to_round=1)
    expected = _reference(engine, snapshot, slug=slug)
    assert snapshot["manifest"]["rows_per_source"] == {
        "demonstration": 4,
        "takeover": 0,
        "relabel": 2,
    }
    assert snapshot["content_sha256"] == reference_hash(
        expected, n_features=2, discrete=False, width=2
    )
    for reader in ("parquet", "duckdb", "npz", "jsonl"):
        fmt = "parquet" if reader == "duckdb" else reader
        rows = rows_of(_get(client, trainer, slug=slug, format=fmt), reader, tmp_path)
        assert as_tuples(rows) == as_tuples(expected), reader
    relabelled = {r["step_id"]: r for r in expected}[steps[0]]
    # numpy.median per dimension of the float32-stored votes (reference library)
    stored = np.asarray(votes, dtype=np.float32).astype(np.float64)
    np.testing.assert_array_equal(
        relabelled["expert_action"], np.median(stored, axis=0).astype(np.float32)
    )
    # tolerance 10% of each range (0.2 and 0.04): only the first vote lies within both
    assert relabelled["agreement"] == pytest.approx(1 / 3)
    assert relabelled["label_count"] == 3


def _second_version(client, labeller, trainer, uploader, steps) -> dict[str, Any]:
    labeller.add(SLUG, steps[1], [None, None, 0])  # tie resolved: a new relabel
    labeller.add(SLUG, steps[6], [None, 2, 2])  # proceed -> hold: consensus changed
    labeller.add(SLUG, steps[0], [None, None, 2])  # creep 2 vs hold 2: leaves the set
    upload(client, uploader, SLUG, 1, LATE_ROLLOUT)
    return _snapshot(client, trainer, up_to_round=1)


@pytest.mark.parametrize("fmt", FORMATS)
def test_since_equals_the_difference_of_two_full_exports(
    client, discrete_loop, labeller, trainer, uploader, small_batches, fmt, tmp_path
):
    steps = _labels(labeller)
    first = _snapshot(client, trainer, up_to_round=1)
    second = _second_version(client, labeller, trainer, uploader, steps)
    assert (first["version"], second["version"]) == ("v1", "v2")
    full_1 = as_tuples(rows_of(_get(client, trainer, "v1", format=fmt), fmt, tmp_path))
    full_2 = as_tuples(rows_of(_get(client, trainer, "v2", format=fmt), fmt, tmp_path))
    since = rows_of(_get(client, trainer, "v2", format=fmt, since="v1"), fmt, tmp_path)
    assert as_tuples(since) == full_2 - full_1
    ids = {r["step_id"] for r in since}
    assert steps[1] in ids  # newly resolved
    assert steps[6] in ids  # consensus changed between versions
    assert steps[0] not in ids  # left the set; an incremental export cannot list removals
    assert len(since) == 3  # with the new takeover
    nothing = rows_of(_get(client, trainer, "v2", format=fmt, since="v2"), fmt, tmp_path)
    assert nothing == []


def test_a_tampered_store_changes_no_export(
    client, engine, settings, discrete_loop, trainer, tmp_path
):
    """Every format holds the rows the version was made with: decoded from its stored file, or,
    once that is gone, rebuilt from the store and cut off when the store no longer hashes to the
    version. The stored Parquet file streamed as it is: test_stored_files.py."""
    _snapshot(client, trainer)
    made = {
        fmt: as_tuples(rows_of(_get(client, trainer, format=fmt), fmt, tmp_path))
        for fmt in ("npz", "jsonl")
    }
    with engine.begin() as conn:
        conn.execute(text("UPDATE steps SET features = :f WHERE id = 1"), {"f": b"\x00" * 12})
    for fmt, rows in made.items():
        assert as_tuples(rows_of(_get(client, trainer, format=fmt), fmt, tmp_path)) == rows
    for path in settings.snapshot_dir.rglob("*.parquet"):
        path.unlink()
    for fmt in made:
        with pytest.raises(SnapshotChanged, match="v1"):
            client.get(f"{BASE}/snapshots/v1/export", params={"format": fmt}, headers=trainer)


def test_a_version_made_before_one_vote_each_reads_back_as_it_was_hashed(
    client, app, engine, settings, discrete_loop, labeller, trainer, tmp_path
):
    """Consensus gives each annotator one vote per state (a span copy beside its author's own
    answer does not vote); a version made before counted every label, and once its stored file
    is gone its rows are rebuilt the way they were hashed, not refused as altered."""
    steps = labeller.learner_steps(SLUG, 1)
    labeller.add(SLUG, steps[0], [1, 2])  # creep and hold from two annotators: a tie
    with app.state.session_factory() as session:
        round_id = session.scalar(select(Step.round_id).where(Step.id == steps[0]))
        session.add(  # the first annotator's span copy of a hold answered on a later state
            Label(
                step_id=steps[0],
                round_id=round_id,
                user_id=labeller.users[0],
                submission_id="later-answer.1",
                answer=ANSWER_ACTION,
                action=2,
                span=True,
            )
        )
        session.commit()
    _snapshot(client, trainer, up_to_round=1)
    made = rows_of(_get(client, trainer, format="jsonl"), "jsonl", tmp_path)
    assert steps[0] not in {r["step_id"] for r in made}  # one vote each: a tie, left out
    with app.state.session_factory() as session:  # the version as the service made it before
        snapshot = session.scalar(select(Snapshot))
        loop = session.get(Loop, snapshot.loop_id)
        legacy = replace(cutoff_of(snapshot), one_vote_each=False)
        spec = spec_of(loop)
        hasher = ContentHasher(
            n_features=spec.n_features, discrete=True, action_width=spec.action_width
        )
        for batch in ts.iter_batches(session, loop=loop, spec=spec, cutoff=legacy):
            hasher.update(batch)
        snapshot.manifest = {k: v for k, v in snapshot.manifest.items() if k != "votes"}
        snapshot.content_sha256 = hasher.hexdigest()
        session.commit()
    for path in settings.snapshot_dir.rglob("*.parquet"):
        path.unlink()
    rows = rows_of(_get(client, trainer, format="jsonl"), "jsonl", tmp_path)
    relabel = {r["step_id"]: r for r in rows}[steps[0]]
    # every label voted: creep, hold and the span copy's hold
    assert (relabel["expert_action"], relabel["label_count"]) == (2, 3)
    assert len(rows) == len(made) + 1


def _client(client, headers) -> Client:
    token = headers["Authorization"].split(" ", 1)[1]
    return Client("http://testserver", token, transport=client._transport)


def test_client_pull_returns_numpy_arrays(client, engine, discrete_loop, labeller, trainer):
    steps = _labels(labeller)
    with _client(client, trainer) as api:
        made = api.create_snapshot(SLUG, up_to_round=1)
        assert made["version"] == "v1" and api.snapshots(SLUG)[0]["version"] == "v1"
        arrays = api.pull(SLUG)
        table = api.pull(SLUG, version="v1", as_table=True)
        assert isinstance(table, pa.Table) and table.num_rows == 10
        labeller.add(SLUG, steps[2], [2])
        api.create_snapshot(SLUG, up_to_round=1)
        added = api.pull(SLUG, since="v1")
        with pytest.raises(ApiError) as missing:
            api.pull(SLUG, version="v9")
    assert missing.value.status_code == 404 and "v9" in missing.value.detail
    assert arrays["features"].shape == (10, 3) and arrays["features"].dtype == np.float32
    assert arrays["expert_action"].dtype == np.int64 and arrays["expert_action"].shape == (10,)
    expected = sorted(_reference(engine, made), key=lambda r: r["step_id"])
    np.testing.assert_array_equal(arrays["step_id"], [r["step_id"] for r in expected])
    np.testing.assert_array_equal(
        arrays["features"], np.array([r["features"] for r in expected], dtype=np.float32)
    )
    assert arrays["source"].tolist() == [r["source"] for r in expected]
    assert arrays["rollout"].tolist() == [r["rollout"] for r in expected]
    assert added["step_id"].tolist() == [steps[2]]


def test_annotator_client_is_refused(client, discrete_loop, trainer, annotator):
    _snapshot(client, trainer)
    with _client(client, annotator) as api, pytest.raises(ApiError) as refused:
        api.pull(SLUG)
    assert refused.value.status_code == 403


def test_cli_export_writes_the_file(client, discrete_loop, trainer, monkeypatch, tmp_path):
    _snapshot(client, trainer)
    real = httpx.Client

    def through_test_app(*args: Any, **kwargs: Any) -> httpx.Client:
        return real(*args, **{**kwargs, "transport": client._transport})

    monkeypatch.setattr(client_module.httpx, "Client", through_test_app)
    token = trainer["Authorization"].split(" ", 1)[1]
    out = tmp_path / "v1.parquet"
    args = ["export", "--loop", SLUG, "--version", "v1", "--format", "parquet", "--out", str(out)]
    result = CliRunner().invoke(cli, [*args, "--url", "http://testserver", "--token", token])
    assert result.exit_code == 0, result.output
    assert "7 rows" in result.output and "v1" in result.output
    assert read_parquet(out.read_bytes()).num_rows == 7
    assert not (tmp_path / "v1.parquet.part").exists()
    bad = CliRunner().invoke(
        cli,
        ["export", "--loop", SLUG, "--version", "v4", "--out", str(tmp_path / "x.parquet")]
        + ["--url", "http://testserver", "--token", token],
    )
    assert bad.exit_code == 2 and "v4" in bad.output
    assert not (tmp_path / "x.parquet").exists()


def test_cli_names_an_incremental_export_as_one(
    client, discrete_loop, labeller, trainer, monkeypatch, tmp_path
):
    """`export --since` used to write LOOP-vN.FORMAT, the full version's name, over a full
    export pulled before; it takes the server's name for it, LOOP-vN-since-vM.FORMAT."""
    steps = _labels(labeller)
    _snapshot(client, trainer, up_to_round=1)
    labeller.add(SLUG, steps[2], [2])
    _snapshot(client, trainer, up_to_round=1)
    real = httpx.Client

    def through_test_app(*args: Any, **kwargs: Any) -> httpx.Client:
        return real(*args, **{**kwargs, "transport": client._transport})

    monkeypatch.setattr(client_module.httpx, "Client", through_test_app)
    pulls = tmp_path / "pulls"
    pulls.mkdir()
    monkeypatch.chdir(pulls)
    token = trainer["Authorization"].split(" ", 1)[1]
    remote = ["--url", "http://testserver", "--token", token]
    full = CliRunner().invoke(cli, ["export", "--loop", SLUG, "--format", "jsonl", *remote])
    assert full.exit_code == 0, full.output
    since = CliRunner().invoke(
        cli, ["export", "--loop", SLUG, "--format", "jsonl", "--since", "v1", *remote]
    )
    assert since.exit_code == 0, since.output
    assert sorted(p.name for p in pulls.iterdir()) == [
        f"{SLUG}-v2-since-v1.jsonl",
        f"{SLUG}-v2.jsonl",
    ]
    whole = rows_of((pulls / f"{SLUG}-v2.jsonl").read_bytes(), "jsonl", tmp_path)
    added = rows_of((pulls / f"{SLUG}-v2-since-v1.jsonl").read_bytes(), "jsonl", tmp_path)
    assert [r["step_id"] for r in added] == [steps[2]] and len(whole) > len(added)
    missing = CliRunner().invoke(
        cli, ["export", "--loop", SLUG, "--format", "jsonl", "--since", "v7", *remote]
    )
    assert missing.exit_code == 2 and "v7" in missing.output


def _stored_rows(settings, version: int, tmp_path: Path) -> set[tuple[Any, ...]]:
    """Rows of a version's stored Parquet file, written in the pass that made the version."""
    [path] = settings.snapshot_dir.rglob(f"v{version}-*.parquet")
    return as_tuples(rows_of(path.read_bytes(), "parquet", tmp_path))


def test_rebuilt_exports_hold_the_stored_files_rows_in_every_format(
    client, settings, discrete_loop, labeller, trainer, uploader, small_batches, tmp_path
):
    """The stored file (written while the version was hashed) against every export rebuilt
    from the store: full exports in each format, and since= exports equal the difference of
    the two stored files."""
    steps = _labels(labeller)
    first = _snapshot(client, trainer, up_to_round=1)
    second = _second_version(client, labeller, trainer, uploader, steps)
    stored_1, stored_2 = _stored_rows(settings, 1, tmp_path), _stored_rows(settings, 2, tmp_path)
    assert (len(stored_1), len(stored_2)) == (first["row_count"], second["row_count"])
    assert len(stored_2 - stored_1) == 3
    for path in settings.snapshot_dir.rglob("*.parquet"):
        path.unlink()  # every pull below is rebuilt from the store
    for fmt in FORMATS:
        for version, stored in (("v1", stored_1), ("v2", stored_2)):
            rebuilt = rows_of(_get(client, trainer, version, format=fmt), fmt, tmp_path)
            assert as_tuples(rebuilt) == stored, (fmt, version)
        since = rows_of(_get(client, trainer, "v2", format=fmt, since="v1"), fmt, tmp_path)
        assert as_tuples(since) == stored_2 - stored_1, fmt
