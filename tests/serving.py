"""Test and benchmark helpers: expertloop in a uvicorn subprocess, a scratch store migrated from
nothing, and a queue of chosen states.

The subprocess is a real server process, as deployed: its own event loop, thread pool and
database connections, and with `workers` > 1 several processes competing for the same store.
It runs the installed `expertloop` (an editable install of the tree under test).
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import numpy as np
from sqlalchemy import select, text
from sqlalchemy.orm import Session

from expertloop.db import make_engine
from expertloop.demo.local_server import free_port
from expertloop.errors import InvalidInput
from expertloop.ingest.models import Step
from expertloop.loops.models import Loop, Round
from expertloop.migrations_state import upgrade
from expertloop.queue import service as queue_service

# the repository root (artifacts of browser tests are written below it)
ROOT = Path(__file__).resolve().parents[1]
START_SECONDS = 60


@dataclass(frozen=True)
class ServerProcess:
    url: str
    pid: int


@contextmanager
def server_process(
    database_url: str,
    data_dir: Path,
    *,
    workers: int = 1,
    log_path: Path | None = None,
    app: str = "expertloop.asgi:app",
    app_dir: Path | None = None,
) -> Iterator[ServerProcess]:
    """Run the app with uvicorn until the block ends; the server's output goes to `log_path`
    (default: this process's own output). Another `app` (module:attribute, found in `app_dir`)
    must answer GET /healthz too: benchmarks serve their baselines this way."""
    port = free_port()
    data_dir.mkdir(parents=True, exist_ok=True)
    env = {
        **os.environ,
        "EXPERTLOOP_DATABASE_URL": database_url,
        "EXPERTLOOP_DATA_DIR": str(data_dir),
    }
    command = [
        *(sys.executable, "-m", "uvicorn", app),
        *("--host", "127.0.0.1", "--port", str(port), "--workers", str(workers)),
        *("--log-level", "warning", "--no-access-log"),
        *(("--app-dir", str(app_dir)) if app_dir is not None else ()),
    ]
    sink = log_path.open("wb") if log_path is not None else None
    try:
        process = subprocess.Popen(command, env=env, stdout=sink, stderr=sink)
        try:
            url = f"http://127.0.0.1:{port}"
            wait_until_healthy(process, url, log_path)
            yield ServerProcess(url=url, pid=process.pid)
        finally:
            stop(process)
    finally:
        if sink is not None:
            sink.close()


def wait_until_healthy(
    process: subprocess.Popen[Any],
    url: str,
    log_path: Path | None,
    seconds: float = START_SECONDS,
) -> None:
    """Return once `url`/healthz answers 200; fail with the log's tail if the process exits or
    `seconds` pass first."""
    deadline = time.monotonic() + seconds
    while True:
        if process.poll() is not None:
            raise RuntimeError(f"the server exited at start{_tail(log_path)}")
        try:
            if httpx.get(url + "/healthz", timeout=1).status_code == 200:
                return
        except httpx.TransportError:
            pass
        if time.monotonic() > deadline:
            raise RuntimeError(f"the server did not start within {seconds} s{_tail(log_path)}")
        time.sleep(0.1)


def stop(process: subprocess.Popen[Any]) -> None:
    """Terminate a server process, and kill it if it has not ended within 30 s."""
    process.terminate()
    try:
        process.wait(timeout=30)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait()


def _tail(log_path: Path | None) -> str:
    return "" if log_path is None else ": " + log_path.read_text(errors="replace")[-2000:]


def upgrade_empty(database_url: str) -> None:
    """Empty a scratch database and migrate it from nothing (tests, benchmarks).

    PostgreSQL: the public schema is dropped with everything in it and made again. SQLite: the
    file is taken as it is (callers pass a new one).
    """
    if database_url.startswith("postgresql"):
        engine = make_engine(database_url)
        with engine.begin() as conn:
            conn.execute(text("DROP SCHEMA public CASCADE"))
            conn.execute(text("CREATE SCHEMA public"))
        engine.dispose()
    upgrade(database_url)


def enqueue_steps(
    session: Session, *, rnd: Round, loop: Loop, step_ids: Sequence[int], seed: int = 0
) -> int:
    """Queue steps of a round in the given order, without a ranking (tests and benchmarks that
    need a queue of known states)."""
    wanted = list(dict.fromkeys(int(s) for s in step_ids))
    found = set(
        session.scalars(select(Step.id).where(Step.id.in_(wanted), Step.round_id == rnd.id))
    )
    missing = [s for s in wanted if s not in found]
    if missing:
        raise InvalidInput(f"step_ids: {missing[:10]} are not states of round {rnd.number}")
    return queue_service.enqueue_in_order(
        session,
        rnd=rnd,
        loop=loop,
        step_ids=wanted,
        selected_ids=[None] * len(wanted),
        rng=np.random.default_rng(seed),
    )
