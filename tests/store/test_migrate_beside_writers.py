"""Migrating a SQLite store while another process writes to it (a worker started beside the
server, say) waits its turn instead of failing.

A deferred SQLite transaction that reads and later writes fails at once with "database is
locked" when another connection committed in between (its snapshot is stale; the busy timeout
does not apply). The migration's transaction therefore takes the write lock at BEGIN.
"""

from __future__ import annotations

import sqlite3
import threading
import time
from pathlib import Path

from expertloop.db import make_engine
from expertloop.migrations_state import current_and_head, upgrade


def test_a_fresh_store_migrates_while_another_connection_keeps_writing(tmp_path: Path) -> None:
    path = tmp_path / "store.db"
    stop = threading.Event()
    commits: list[int] = []

    def write_constantly() -> None:
        db = sqlite3.connect(path, timeout=30, isolation_level=None)
        db.execute("PRAGMA journal_mode=WAL")
        db.execute("CREATE TABLE IF NOT EXISTS beside (n INTEGER)")
        while not stop.is_set():
            db.execute("BEGIN IMMEDIATE")
            db.execute("INSERT INTO beside VALUES (1)")
            db.execute("COMMIT")
            commits.append(1)
            time.sleep(0.001)
        db.close()

    writer = threading.Thread(target=write_constantly)
    writer.start()
    try:
        while not commits:
            time.sleep(0.01)
        upgrade(f"sqlite:///{path}")
        # the other connection was writing all along, and still writes after the migration
        written = len(commits)
        while len(commits) == written and writer.is_alive():
            time.sleep(0.01)
        assert len(commits) > written
    finally:
        stop.set()
        writer.join()
    engine = make_engine(f"sqlite:///{path}")
    with engine.connect() as conn:
        current, head = current_and_head(conn)
    engine.dispose()
    assert current == head
