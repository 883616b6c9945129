"""Run expertloop's own commands as real processes, the way docker-compose.yml starts them.

The subprocesses import this source tree (PYTHONPATH), log to files the test can show when it
fails, and are always ended by the test that started them, by their process id.
"""

from __future__ import annotations

import io
import os
import re
import signal
import subprocess
import time
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import yaml

ROOT = Path(__file__).resolve().parents[2]
COMPOSE_FILE = ROOT / "docker-compose.yml"
TOKEN_LINE = re.compile(r"API token \(shown once\): (\S+)")


def compose_services() -> dict[str, Any]:
    """The services of docker-compose.yml (anchors resolved by the YAML loader)."""
    services: dict[str, Any] = yaml.safe_load(COMPOSE_FILE.read_text())["services"]
    return services


def process_env(environment: Mapping[str, Any], **overrides: Any) -> dict[str, str]:
    """This machine's environment without EXPERTLOOP_* settings, plus the service's own.

    Overrides are EXPERTLOOP_* settings given by their lowercase name (database_url=...).
    """
    env = {k: v for k, v in os.environ.items() if not k.startswith("EXPERTLOOP_")}
    env.update({k: str(v) for k, v in environment.items()})
    env.update({f"EXPERTLOOP_{k.upper()}": str(v) for k, v in overrides.items()})
    # the subprocesses import this source tree, whichever tree the package was installed from
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))
    env["PYTHONUNBUFFERED"] = "1"
    return env


def run_command(
    command: Sequence[str], env: Mapping[str, str], timeout: float = 120.0
) -> subprocess.CompletedProcess[str]:
    """Run a one-shot command (migrate, the CLI) to its end."""
    return subprocess.run(
        list(command), env=dict(env), cwd=ROOT, capture_output=True, text=True, timeout=timeout
    )


def add_user(env: Mapping[str, str], name: str, role: str) -> dict[str, str]:
    """`expertloop users add NAME --role ROLE`; returns the printed token as a header."""
    done = run_command(["expertloop", "users", "add", name, "--role", role], env)
    assert done.returncode == 0, done.stderr
    found = TOKEN_LINE.search(done.stdout)
    assert found, done.stdout
    return {"Authorization": f"Bearer {found.group(1)}"}


class Service:
    """A long-running command (server or worker) with its output in a log file."""

    def __init__(
        self, name: str, command: Sequence[str], env: Mapping[str, str], log_dir: Path
    ) -> None:
        self.name = name
        self.command = list(command)
        self.env = dict(env)
        self.log_path = log_dir / f"{name}.log"
        self.process: subprocess.Popen[bytes] | None = None

    def start(self) -> Service:
        log = self.log_path.open("ab")
        # a session of its own, so that a signal meant for the test runner does not reach it
        self.process = subprocess.Popen(
            self.command,
            env=self.env,
            cwd=ROOT,
            stdout=log,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        log.close()
        return self

    @property
    def pid(self) -> int:
        assert self.process is not None
        return self.process.pid

    def alive(self) -> bool:
        return self.process is not None and self.process.poll() is None

    def output(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""

    def kill(self) -> None:
        """SIGKILL: the process gets no chance to clean up (a crash, an OOM kill)."""
        if self.alive():
            assert self.process is not None
            self.process.kill()
            self.process.wait(timeout=10)

    def stop(self, timeout: float = 15.0) -> None:
        """SIGTERM and wait; SIGKILL to its process group if it does not end in time."""
        if self.process is None or self.process.poll() is not None:
            return
        self.process.terminate()
        try:
            self.process.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            os.killpg(self.process.pid, signal.SIGKILL)
            self.process.wait(timeout=10)

    def __repr__(self) -> str:
        return f"<{self.name} pid={self.process.pid if self.process else None}>"


def stop_all(services: Sequence[Service]) -> None:
    """Stop every service, newest first; never raises before all were asked to stop."""
    for service in reversed(services):
        try:
            service.stop()
        except Exception:  # keep going: the others must be stopped too
            service.kill()


def wait_until(
    check: Any, *, timeout: float, interval: float = 0.1, what: str = "condition"
) -> Any:
    """Poll `check()` until it returns something truthy; fail after `timeout` seconds."""
    deadline = time.monotonic() + timeout
    while True:
        value = check()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {what}")
        time.sleep(interval)


def wait_for_http(base_url: str, server: Service, timeout: float = 60.0) -> None:
    """Wait until the server answers /healthz; fail early with its log if it exits."""

    def up() -> bool:
        if not server.alive():
            raise AssertionError(f"{server.name} exited:\n{server.output()[-3000:]}")
        try:
            return httpx.get(f"{base_url}/healthz", timeout=2).status_code == 200
        except httpx.TransportError:
            return False

    wait_until(up, timeout=timeout, interval=0.2, what=f"{server.name} to answer")


def serve_command(port: int, workers: int = 1) -> list[str]:
    return [
        "expertloop",
        "serve",
        "--host",
        "127.0.0.1",
        "--port",
        str(port),
        "--workers",
        str(workers),
    ]


def wait_for_job(
    client: httpx.Client, job_id: int, headers: Mapping[str, str], timeout: float
) -> dict[str, Any]:
    """Poll a job until it is done or failed."""

    def finished() -> dict[str, Any] | None:
        job: dict[str, Any] = client.get(f"/api/jobs/{job_id}", headers=headers).json()
        return job if job["status"] in ("done", "failed") else None

    result: dict[str, Any] = wait_until(finished, timeout=timeout, interval=0.25, what="the job")
    return result


# --- rollout files big enough to take measurable time, built column-wise ---------------------


def discrete_round_parquet(
    n_rollouts: int, steps: int, *, seed: int, expert: bool, prefix: str = "r"
) -> bytes:
    """A discrete-loop rollout file (three features) of n_rollouts * steps rows, vectorised.

    tests/helpers.discrete_rows builds rows one by one; this builds the same contract
    column-wise so that files of hundreds of thousands of steps take well under a second.
    """
    rng = np.random.default_rng(seed)
    n = n_rollouts * steps
    actions = np.array(["proceed", "creep", "hold"])
    features = rng.normal(size=(n, 3)).round(3)
    columns: dict[str, Any] = {
        "rollout": np.repeat([f"{prefix}{r:05d}" for r in range(n_rollouts)], steps),
        "step": np.tile(np.arange(steps, dtype=np.int64), n_rollouts),
        "time_s": np.tile(np.arange(steps) * 0.1, n_rollouts),
        "features": _list_column(features),
    }
    if expert:
        columns["control"] = np.full(n, "expert")
        columns["expert_action"] = actions[np.arange(n) % 3]
    else:
        probs = rng.dirichlet(np.ones(3), size=n).astype(np.float32)
        probs = (probs / probs.sum(axis=1, keepdims=True)).astype(np.float64)
        columns["control"] = np.full(n, "learner")
        columns["learner_action"] = actions[probs.argmax(axis=1)]
        columns["learner_probs"] = _list_column(probs)
    sink = io.BytesIO()
    pq.write_table(pa.table(columns), sink)
    return sink.getvalue()


def _list_column(matrix: np.ndarray) -> pa.ListArray:
    n, width = matrix.shape
    offsets = pa.array(np.arange(0, (n + 1) * width, width, dtype=np.int32))
    return pa.ListArray.from_arrays(offsets, pa.array(matrix.ravel()))


def chunked(data: bytes, size: int) -> Iterator[bytes]:
    for start in range(0, len(data), size):
        yield data[start : start + size]
