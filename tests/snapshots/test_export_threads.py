"""The threads and connections of exports rebuilt from the store, and a client that hangs up.

What must hold (app/shared/overlap.py, app/shared/bulk_reads.py, app/snapshots/router.py):
repeated exports reuse their threads instead of starting new ones; on PostgreSQL, bulk-read
connections are kept between passes, and one that broke or whose pass failed is never lent
again; a client that goes away mid-stream leaves no thread, connection or partial file behind.
The reference for every export's bytes is the version's stored file written when it was made.
"""

from __future__ import annotations

import os
import threading
import time
from pathlib import Path

import httpx
import numpy as np
import pytest
from sqlalchemy import text

from bench.export import SLUG as BENCH_SLUG
from bench.export import prepare_store
from expertloop.loops import service as loops_service
from expertloop.loops.spec import spec_of
from expertloop.shared import training_set as ts
from expertloop.shared.bulk_reads import IDLE_CONNECTIONS
from expertloop.shared.overlap import LANES
from expertloop.snapshots import files
from tests.conftest import PG_URL
from tests.serving import server_process
from tests.snapshots.conftest import BASE, SLUG

EXPORT = f"{BASE}/snapshots/v1/export"


def _stored(snapshot_dir: Path) -> list[Path]:
    return sorted(snapshot_dir.rglob(f"*{files.SUFFIX}"))


def _leftovers(snapshot_dir: Path) -> list[Path]:
    return sorted(snapshot_dir.rglob(f"*{files.SPOOL_SUFFIX}"))


def test_repeated_rebuilt_exports_start_no_threads(client, settings, discrete_loop, trainer):
    assert client.post(f"{BASE}/snapshots", json={}, headers=trainer).status_code == 201
    [path] = _stored(settings.snapshot_dir)
    made = path.read_bytes()
    started = threads = None
    for pull in range(6):
        files.discard(path)
        # from the store; the Parquet pull stores the file again; then decoded from that file
        for fmt in ("jsonl", "npz", "parquet", "jsonl", "npz"):
            got = client.get(EXPORT, params={"format": fmt}, headers=trainer)
            assert got.status_code == 200, got.text
        assert path.read_bytes() == made  # the rebuilt file is the one made with the version
        if pull == 0:
            started, threads = LANES.started, threading.active_count()
    assert LANES.started == started
    assert threading.active_count() <= threads


def _pass(app) -> list[int]:
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=SLUG)
        cutoff = ts.current_cutoff(session, loop=loop, up_to_round=1)
        batches = ts.iter_batches(session, loop=loop, spec=spec_of(loop), cutoff=cutoff, batch=4)
        return [int(i) for batch in batches for i in batch.step_id]


@pytest.mark.skipif(not PG_URL, reason="bulk-read connections beside the pool: PostgreSQL only")
def test_bulk_read_connections_are_kept_and_a_broken_one_is_replaced(app, engine, discrete_loop):
    first = _pass(app)  # a connection is opened, or one kept from an earlier test is lent
    opened = IDLE_CONNECTIONS.opened
    for _ in range(3):
        assert _pass(app) == first
    assert IDLE_CONNECTIONS.opened == opened  # every pass after the first reused it
    assert len(IDLE_CONNECTIONS) >= 1
    with engine.begin() as conn:  # the server ends the kept connection (a restart, a timeout)
        ended = conn.execute(
            text(
                "SELECT count(pg_terminate_backend(pid)) FROM pg_stat_activity "
                "WHERE datname = current_database() AND pid <> pg_backend_pid() "
                "AND query LIKE '%FROM steps WHERE%'"
            )
        ).scalar_one()
    assert ended >= 1
    time.sleep(0.1)
    assert _pass(app) == first  # the broken one was tried, dropped and replaced
    assert IDLE_CONNECTIONS.opened > opened


@pytest.mark.skipif(not PG_URL, reason="bulk-read connections beside the pool: PostgreSQL only")
def test_a_connection_whose_pass_failed_is_not_kept(
    app, client, engine, settings, discrete_loop, trainer
):
    assert client.post(f"{BASE}/snapshots", json={}, headers=trainer).status_code == 201
    for path in _stored(settings.snapshot_dir):
        files.discard(path)  # the export below reads the store
    _pass(app)
    kept = len(IDLE_CONNECTIONS)
    assert kept >= 1
    with engine.begin() as conn:  # a damaged vector: the pass fails mid-way with its name
        conn.execute(text("UPDATE steps SET features = :f WHERE id = 2"), {"f": b"\x00" * 8})
    with pytest.raises(ValueError, match="features"):
        client.get(EXPORT, params={"format": "jsonl"}, headers=trainer)
    assert len(IDLE_CONNECTIONS) == kept - 1  # the one it took was closed, not given back


def _server_connections(engine) -> int:
    """Connections to the test database other than this test's own."""
    with engine.connect() as conn:
        return int(
            conn.execute(
                text(
                    "SELECT count(*) FROM pg_stat_activity "
                    "WHERE datname = current_database() AND pid <> pg_backend_pid()"
                )
            ).scalar_one()
        )


def _settled(check, seconds: float = 10.0) -> bool:
    deadline = time.monotonic() + seconds
    while not check():
        if time.monotonic() > deadline:
            return False
        time.sleep(0.05)
    return True


@pytest.mark.slow
def test_a_client_gone_mid_stream_leaves_no_thread_connection_or_file(
    database_url, engine, tmp_path
):
    """Through a real server: the client reads the first bytes of a 25 MB rebuilt export and
    hangs up; the server's threads (and on PostgreSQL its connections to the store) go back to
    what they were after a complete export, and no partial file is left or kept."""
    token = prepare_store(database_url, 100_000, 64, np.random.default_rng(3), migrate=False)
    data = tmp_path / "server-data"
    snapshot_dir = data / "snapshots"
    url = f"/api/loops/{BENCH_SLUG}/snapshots/v1/export"
    with (
        server_process(database_url, data) as server,
        httpx.Client(
            base_url=server.url, headers={"Authorization": f"Bearer {token}"}, timeout=60
        ) as api,
    ):
        assert api.post(f"/api/loops/{BENCH_SLUG}/snapshots", json={}).status_code == 201
        [path] = _stored(snapshot_dir)
        made = path.read_bytes()
        assert len(made) > 20_000_000  # far more than the sockets between us hold

        def threads() -> int:
            return len(os.listdir(f"/proc/{server.pid}/task"))

        files.discard(path)
        assert api.get(url).content == made  # lanes and connections made, kept for reuse
        before = threads(), _server_connections(engine) if PG_URL else 0
        for _ in range(2):
            files.discard(path)
            with api.stream("GET", url) as response:
                assert response.status_code == 200
                first = next(response.iter_raw())
                assert made.startswith(first)
                # leaving the block closes the connection with most of the file unsent
            assert _settled(lambda: _leftovers(snapshot_dir) == [])
            assert _stored(snapshot_dir) == []  # a file cut short is never kept
            assert _settled(lambda: threads() <= before[0]), (threads(), before)
            if PG_URL:
                assert _settled(lambda: _server_connections(engine) <= before[1])
        assert api.get(url).content == made  # and the next client gets the whole file
        assert threads() <= before[0]
