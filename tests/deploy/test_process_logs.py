"""`expertloop worker` and `expertloop serve` write JSON lines when EXPERTLOOP_LOG_FORMAT=json."""

from __future__ import annotations

import json
from pathlib import Path

import httpx
import pytest

from tests.deploy.pgcluster import free_port
from tests.deploy.services import Service, process_env, serve_command, wait_for_http, wait_until


def _json_lines(text: str) -> list[dict[str, object]]:
    return [json.loads(line) for line in text.splitlines() if line.strip()]


@pytest.mark.slow
def test_worker_and_server_log_json_lines(tmp_path: Path, log_dir: Path) -> None:
    # the embedded SQLite store is enough: this checks the processes' log wiring only
    env = process_env({}, data_dir=tmp_path / "data", job_mode="worker", log_format="json")
    port = free_port()
    worker = Service("worker", ["expertloop", "worker"], env, log_dir).start()
    server = Service("app", serve_command(port), env, log_dir).start()
    try:
        wait_for_http(f"http://127.0.0.1:{port}", server)
        assert httpx.get(f"http://127.0.0.1:{port}/readyz").status_code == 200
        wait_until(lambda: "running" in worker.output(), timeout=30, what="the worker to log")
    finally:
        server.stop()
        worker.stop()
    # every line of both processes parses: nothing was printed around the logging setup
    worker_lines = _json_lines(worker.output())
    assert worker_lines[0]["logger"] == "expertloop.worker"
    assert str(worker_lines[0]["message"]).startswith("worker ")
    assert worker_lines[-1]["message"] == "worker stopped"
    server_lines = _json_lines(server.output())
    access = [e for e in server_lines if e["logger"] == "uvicorn.access"]
    assert {(e["method"], e["path"], e["status"]) for e in access} >= {
        ("GET", "/healthz", 200),
        ("GET", "/readyz", 200),
    }
    assert any(e["logger"] == "uvicorn.error" and e["level"] == "INFO" for e in server_lines)
