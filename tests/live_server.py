"""A real server for tests: uvicorn in a subprocess on a free loopback port, against a test store."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx

ROOT = Path(__file__).resolve().parent.parent


def free_port() -> int:
    """A port free on 127.0.0.1 right now (the server binds it a moment later)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@contextmanager
def live_server(database_url: str, data_dir: Path, *, workers: int = 1) -> Iterator[str]:
    """Run this worktree's app with uvicorn; yields its base URL and stops it afterwards."""
    port = free_port()
    log = data_dir.parent / f"server-{port}.log"
    data_dir.mkdir(parents=True, exist_ok=True)
    env = {
        **os.environ,
        "EXPERTLOOP_DATABASE_URL": database_url,
        "EXPERTLOOP_DATA_DIR": str(data_dir),
        # the worktree's `app`, not an installed copy
        "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])),
    }
    command = [
        sys.executable,
        "-m",
        "uvicorn",
        "app.asgi:app",
        "--host",
        "127.0.0.1",
        "--port",
        str(port),
        "--workers",
        str(workers),
        "--log-level",
        "warning",
        "--no-access-log",
    ]
    with log.open("wb") as sink:
        process = subprocess.Popen(command, cwd=ROOT, env=env, stdout=sink, stderr=sink)
        base = f"http://127.0.0.1:{port}"
        try:
            deadline = time.monotonic() + 30
            while True:
                if process.poll() is not None:
                    raise RuntimeError(f"server exited: {log.read_text()[-2000:]}")
                try:
                    if httpx.get(base + "/healthz", timeout=1).status_code == 200:
                        break
                except httpx.TransportError:
                    pass
                if time.monotonic() > deadline:
                    raise RuntimeError(f"server did not start: {log.read_text()[-2000:]}")
                time.sleep(0.1)
            yield base
        finally:
            process.terminate()
            try:
                process.wait(timeout=15)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()
