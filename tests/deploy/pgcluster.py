"""A private PostgreSQL cluster for tests that stop, start or crash the database.

Each cluster lives in its own temporary folder on a free loopback port, owned by the `postgres`
system user when the tests run as root (PostgreSQL refuses to run as root), so stopping it
disturbs no other test or engineer. Needs only the PostgreSQL server binaries.
"""

from __future__ import annotations

import os
import pwd
import shutil
import subprocess
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import psycopg
import pytest

from tests.serving import free_port

PG_VERSIONS = ("17", "16", "15", "14")


def pg_bin_dir() -> Path:
    """The folder holding initdb, pg_ctl and postgres (Debian's layout, else the PATH)."""
    for version in PG_VERSIONS:
        folder = Path(f"/usr/lib/postgresql/{version}/bin")
        if (folder / "pg_ctl").exists():
            return folder
    found = shutil.which("pg_ctl")
    if found is None:
        raise RuntimeError("PostgreSQL server binaries (pg_ctl, initdb) are not installed")
    return Path(found).resolve().parent


class PgCluster:
    """One PostgreSQL server: initdb into a temp folder, start, stop (any mode), connect."""

    def __init__(self, folder: Path, port: int) -> None:
        self.folder = folder
        self.data = folder / "data"
        self.port = port
        self.bin = pg_bin_dir()
        self._as_postgres = os.geteuid() == 0

    # --- lifecycle --------------------------------------------------------------------------

    def _run(self, *args: str, timeout: float = 60.0) -> subprocess.CompletedProcess[str]:
        command = [str(self.bin / args[0]), *args[1:]]
        if self._as_postgres:
            command = ["runuser", "-u", "postgres", "--", *command]
        done = subprocess.run(command, capture_output=True, text=True, timeout=timeout)
        if done.returncode != 0:
            raise RuntimeError(f"{' '.join(command)} failed:\n{done.stdout}\n{done.stderr}")
        return done

    def initdb(self) -> None:
        """Create the cluster (trust authentication, superuser `postgres`)."""
        if self._as_postgres:
            entry = pwd.getpwnam("postgres")
            os.chown(self.folder, entry.pw_uid, entry.pw_gid)
        # --no-sync: a test cluster need not survive a power cut, only a process crash
        self._run("initdb", "-D", str(self.data), "-A", "trust", "-U", "postgres", "--no-sync")

    def start(self) -> None:
        """Start the server and wait until it accepts connections."""
        options = (
            f"-p {self.port} -k {self.folder} -c listen_addresses=127.0.0.1 "
            "-c max_connections=100 -c shared_buffers=32MB"
        )
        self._run("pg_ctl", "-D", str(self.data), "-o", options, "-l", str(self.log), "-w", "start")

    def stop(self, mode: str = "fast") -> None:
        """Stop the server: 'smart', 'fast' (clients are disconnected) or 'immediate' (crash)."""
        self._run("pg_ctl", "-D", str(self.data), "-m", mode, "-w", "stop")

    @property
    def running(self) -> bool:
        return (self.data / "postmaster.pid").exists()

    @property
    def log(self) -> Path:
        return self.folder / "server.log"

    # --- use --------------------------------------------------------------------------------

    def url(self, database: str = "postgres", user: str = "postgres") -> str:
        """SQLAlchemy URL of a database on this server."""
        return f"postgresql+psycopg://{user}@127.0.0.1:{self.port}/{database}"

    def execute(self, sql: str, database: str = "postgres") -> list[tuple[object, ...]]:
        """Run one statement in autocommit mode and return its rows (if any)."""
        with psycopg.connect(
            host="127.0.0.1", port=self.port, user="postgres", dbname=database, autocommit=True
        ) as conn:
            cursor = conn.execute(sql.encode())
            return cursor.fetchall() if cursor.description else []

    def create_database(self, name: str, owner: str = "postgres") -> str:
        """Create a database (and its owner role, if new); returns its URL."""
        if owner != "postgres" and not self.execute(
            f"SELECT 1 FROM pg_roles WHERE rolname = '{owner}'"
        ):
            self.execute(f'CREATE ROLE "{owner}" LOGIN')
        self.execute(f'CREATE DATABASE "{name}" OWNER "{owner}"')
        return self.url(name, owner)

    def wait_until_accepting(self, timeout: float = 30.0) -> None:
        """Block until a connection succeeds (after start, or while recovering)."""
        deadline = time.monotonic() + timeout
        while True:
            try:
                self.execute("SELECT 1")
                return
            except psycopg.OperationalError:
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.1)


@pytest.fixture
def pg_cluster() -> Iterator[PgCluster]:
    """A fresh, running private cluster; stopped and removed after the test."""
    # A short path: the server's Unix socket lives in the folder (path limit about 100 bytes).
    folder = Path(tempfile.mkdtemp(prefix="elpg-"))
    cluster = PgCluster(folder, free_port())
    try:
        cluster.initdb()
        cluster.start()
        yield cluster
    finally:
        if cluster.running:
            try:
                cluster.stop("immediate")
            except (RuntimeError, subprocess.TimeoutExpired):
                pass
        shutil.rmtree(folder, ignore_errors=True)
