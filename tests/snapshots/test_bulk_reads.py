"""Bulk reads of training-set pages: bounded pages, bounded memory, damaged rows named.

Rows are read a page at a time as columns (app/shared/bulk_reads.py: ADBC on PostgreSQL,
aggregates on SQLite); these tests run on whichever store the suite runs on.
"""

from __future__ import annotations

import threading
import tracemalloc
from typing import Any

import adbc_driver_manager
import adbc_driver_postgresql
import numpy as np
import pytest
from sqlalchemy import event, select, text

from expertloop.loops import service as loops_service
from expertloop.loops.spec import spec_of
from expertloop.shared import bulk_reads, training_rows
from expertloop.shared import training_set as ts
from tests.conftest import PG_URL
from tests.helpers import DISCRETE_SPEC, parquet_bytes
from tests.snapshots.conftest import BASE, SLUG

N_ROWS = 40_000
PAGE = 256


def _demonstrations(n_rows: int, steps_per_rollout: int = 1000) -> dict[str, list[Any]]:
    index = np.arange(n_rows)
    rng = np.random.default_rng(7)
    return {
        "rollout": [f"demo-{i // steps_per_rollout}" for i in index.tolist()],
        "step": (index % steps_per_rollout).tolist(),
        "time_s": (0.1 * (index % steps_per_rollout)).tolist(),
        "features": rng.normal(size=(n_rows, 3)).astype(np.float32).tolist(),
        "control": ["expert"] * n_rows,
        "learner_action": [None] * n_rows,
        "learner_probs": [None] * n_rows,
        "expert_action": [["proceed", "creep", "hold"][i % 3] for i in index.tolist()],
    }


@pytest.fixture
def large_loop(client, admin, uploader) -> str:
    client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    response = client.post(
        f"{BASE}/rounds/0/rollouts",
        files={"file": ("demos.parquet", parquet_bytes(_demonstrations(N_ROWS)))},
        headers=uploader,
    )
    assert response.status_code == 201, response.text
    return SLUG


def _pass(app, *, batch: int) -> tuple[int, int, int]:
    """Rows, bytes of every array yielded, and traced peak memory of one pass over the set."""
    rows = total = 0
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=SLUG)
        spec = spec_of(loop)
        cutoff = ts.current_cutoff(session, loop=loop, up_to_round=0)
        # the consensus and the round table are read when the stream is made; the rows as it runs
        parts = ts.iter_batches(session, loop=loop, spec=spec, cutoff=cutoff, batch=batch)
        tracemalloc.start()
        try:
            for part in parts:
                rows += len(part)
                total += sum(
                    getattr(part, name).nbytes
                    for name in ("step_id", "features", "action", "round", "rollout_id")
                )
                del part
            _, peak = tracemalloc.get_traced_memory()
        finally:
            tracemalloc.stop()
    return rows, total, peak


def test_a_pass_reads_pages_of_at_most_the_batch(app, large_loop, monkeypatch):
    seen: list[int] = []
    for reader in (bulk_reads._SqliteReader, bulk_reads._PostgresReader):
        original = reader.page

        def spy(self, sql, columns, _original=original):
            page = _original(self, sql, columns)
            seen.append(len(page["id"]))
            return page

        monkeypatch.setattr(reader, "page", spy)
    rows, _, _ = _pass(app, batch=PAGE)
    assert rows == N_ROWS
    assert max(seen) == PAGE and sum(seen) == N_ROWS
    assert len(seen) == -(-N_ROWS // PAGE)  # one query per page, the last one short


def test_memory_of_a_pass_holds_pages_not_the_table(app, large_loop):
    _pass(app, batch=PAGE)  # the first pass fills caches (compiled statements) that stay
    rows, total, peak = _pass(app, batch=PAGE)
    _, _, whole = _pass(app, batch=N_ROWS)  # the same rows read as one page
    print(f"{rows} rows, {total} bytes of arrays; traced peak {peak} (pages), {whole} (one)")
    assert rows == N_ROWS
    assert whole > total  # tracemalloc sees the arrays of a page
    # a page is 1/156 of the rows; the rest is fixed (statements, result objects)
    assert peak < total / 4, (peak, total)


def test_a_vector_of_another_width_is_named(app, client, engine, settings, discrete_loop, trainer):
    made = client.post(f"{BASE}/snapshots", json={}, headers=trainer)
    assert made.status_code == 201
    for stored in settings.snapshot_dir.rglob("*.parquet"):
        stored.unlink()  # the export below reads the store
    with engine.begin() as conn:
        first = conn.execute(select(text("min(id)")).select_from(text("steps"))).scalar_one()
        conn.execute(
            text("UPDATE steps SET features = :f WHERE id = :id"), {"f": b"\x00" * 8, "id": first}
        )
    with pytest.raises(ValueError, match="features"):
        client.get(f"{BASE}/snapshots/v1/export", params={"format": "jsonl"}, headers=trainer)


@pytest.mark.skipif(not PG_URL, reason="bulk-read connections beside the pool: PostgreSQL only")
def test_no_bulk_read_connection_free_is_a_503_and_changes_nothing(
    client, engine, discrete_loop, trainer, monkeypatch
):
    monkeypatch.setattr(bulk_reads, "_bulk_connections", threading.BoundedSemaphore(1))
    monkeypatch.setattr(bulk_reads, "POOL_TIMEOUT_S", 0.05)
    bulk_reads._bulk_connections.acquire()  # another export holds the only one
    response = client.post(f"{BASE}/snapshots", json={}, headers=trainer)
    assert response.status_code == 503, response.text
    assert response.headers["Retry-After"] == "2"
    assert "no database connection came free" in response.json()["detail"]
    with engine.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM snapshots")).scalar_one() == 0
    bulk_reads._bulk_connections.release()
    assert client.post(f"{BASE}/snapshots", json={}, headers=trainer).status_code == 201


@pytest.mark.skipif(not PG_URL, reason="the bulk-read connection of PostgreSQL")
def test_a_bulk_read_connection_that_fails_is_a_503_and_changes_nothing(
    client, engine, discrete_loop, trainer, monkeypatch
):
    def refused(uri: str) -> None:
        raise adbc_driver_manager.OperationalError(
            "IO: connection refused", status_code=adbc_driver_manager.AdbcStatusCode.IO
        )

    monkeypatch.setattr(adbc_driver_postgresql, "connect", refused)
    response = client.post(f"{BASE}/snapshots", json={}, headers=trainer)
    assert response.status_code == 503, response.text
    assert "the database is unreachable" in response.json()["detail"]
    with engine.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM snapshots")).scalar_one() == 0


def test_an_aggregated_page_is_put_in_id_order():
    """SQLite does not promise the order in which an aggregate sees its rows; a page whose ids
    come out of order is sorted, every column alike."""
    page = {"id": np.array([5, 3, 9]), "features": np.array([[5.0], [3.0], [9.0]])}
    ordered = training_rows._in_id_order(page)
    np.testing.assert_array_equal(ordered["id"], [3, 5, 9])
    np.testing.assert_array_equal(ordered["features"], [[3.0], [5.0], [9.0]])


@pytest.mark.parametrize("span", [1, 2, None])
def test_rollout_keys_equal_the_stores_for_pages_in_any_order(app, discrete_loop, span):
    """Reference: the rollouts table read with plain SQL."""
    with app.state.session_factory() as session:
        stored = {int(i): k for i, k in session.execute(text("SELECT id, key FROM rollouts"))}
        ids = sorted(stored)
        keys = training_rows.RolloutKeys(session, span=span)
        pages = [ids[:2], ids[1:], ids[-1:], ids[:1], [ids[-1], ids[0]], [ids[-1] + 100, ids[1]]]
        for page in pages:
            expected = {i: stored[i] for i in page if i in stored}
            assert keys.of(np.array(page * 3, dtype=np.int64)) == expected, page


def test_rollout_keys_in_id_order_are_read_once_per_range(app, engine, discrete_loop):
    statements: list[str] = []

    def count(conn, cursor, statement, *args):  # type: ignore[no-untyped-def]
        if "rollouts" in statement:
            statements.append(statement)

    with app.state.session_factory() as session:
        ids = sorted(int(i) for i in session.scalars(text("SELECT id FROM rollouts")))
        keys = training_rows.RolloutKeys(session, span=len(ids))
        event.listen(engine, "before_cursor_execute", count)
        try:
            for start in range(len(ids)):  # pages walking the rollouts in id order
                keys.of(np.array(ids[start : start + 2], dtype=np.int64))
        finally:
            event.remove(engine, "before_cursor_execute", count)
    assert len(statements) == 1
