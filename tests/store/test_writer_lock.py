"""SQLite's writer lock across processes: a write transaction waits on the file lock beside the
database while another process holds it, and goes on as soon as it is let go.

flock(2) locks belong to an open file description, so a second descriptor opened here stands in
for another process (common practice: the same rule makes two processes exclude each other)."""

from __future__ import annotations

import fcntl
import os
import threading
from pathlib import Path

from sqlalchemy import text

from expertloop.db import (
    WRITER_LOCK_SUFFIX,
    make_engine,
    make_session_factory,
    write_transaction,
)


def _insert_in_thread(database: Path, done: threading.Event) -> threading.Thread:
    engine = make_engine(f"sqlite:///{database}")

    def run() -> None:
        with make_session_factory(engine)() as session:
            with write_transaction(session):
                session.execute(text("INSERT INTO t VALUES (1)"))
        done.set()

    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    return thread


def test_write_waits_for_another_holder_of_the_file_lock(tmp_path: Path) -> None:
    database = tmp_path / "store.db"
    engine = make_engine(f"sqlite:///{database}")
    with engine.begin() as conn:
        conn.execute(text("CREATE TABLE t (x INTEGER)"))
    other = os.open(str(database) + WRITER_LOCK_SUFFIX, os.O_RDWR | os.O_CREAT)
    try:
        fcntl.flock(other, fcntl.LOCK_EX)
        done = threading.Event()
        thread = _insert_in_thread(database, done)
        assert not done.wait(0.5), "the write went ahead while another process held the lock"
        fcntl.flock(other, fcntl.LOCK_UN)
        assert done.wait(10), "the write did not go on once the lock was let go"
        thread.join(10)
    finally:
        os.close(other)
    with engine.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM t")).scalar_one() == 1


def test_the_lock_is_let_go_after_a_failed_transaction(tmp_path: Path) -> None:
    database = tmp_path / "store.db"
    engine = make_engine(f"sqlite:///{database}")
    with make_session_factory(engine)() as session:
        try:
            with write_transaction(session):
                session.execute(text("CREATE TABLE t (x INTEGER)"))
                raise RuntimeError("refused")
        except RuntimeError:
            pass
    other = os.open(str(database) + WRITER_LOCK_SUFFIX, os.O_RDWR)
    try:
        # Non-blocking: raises BlockingIOError if the failed transaction kept the lock.
        fcntl.flock(other, fcntl.LOCK_EX | fcntl.LOCK_NB)
    finally:
        os.close(other)
