"""Run jobs: a registry of handlers, one-job execution with heartbeats, a thread and a worker loop.

Handlers must be deterministic given the job's params (seeds are recorded in them) and must write
their results in one transaction that replaces any earlier partial result, so that a job taken
over after its worker died finishes with the same result as an uninterrupted run.
"""

from __future__ import annotations

import logging
import os
import socket
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from ..config import Settings
from ..errors import ExpertloopError
from ..shared.allocator import release_free_memory
from . import service
from .models import Job

log = logging.getLogger("expertloop.jobs")

HEARTBEAT_SECONDS = 5.0


def heartbeat_interval(lease_seconds: float) -> float:
    """Seconds between heartbeats: three chances to renew within one lease, at most every 5 s."""
    return min(HEARTBEAT_SECONDS, lease_seconds / 3.0)


class JobLost(RuntimeError):
    """Another worker took the job over (this one stopped renewing its lease in time)."""


@dataclass
class JobContext:
    """What a handler gets: the job, a session factory, settings and a progress reporter."""

    job: Job
    session_factory: sessionmaker[Session]
    settings: Settings
    worker: str
    _last_beat: float = 0.0

    def progress(self, fraction: float, *, force: bool = False) -> None:
        """Report progress; renews the lease at most every few seconds (or now, if forced)."""
        now = time.monotonic()
        lease = self.settings.job_lease_seconds
        if not force and now - self._last_beat < heartbeat_interval(lease):
            return
        self._last_beat = now
        with self.session_factory.begin() as session:
            held = service.heartbeat(
                session,
                job_id=self.job.id,
                worker=self.worker,
                progress=fraction,
                lease_seconds=lease,
            )
        if not held:
            raise JobLost(f"job {self.job.id} was taken over by another worker")


Handler = Callable[[JobContext], dict[str, Any]]
HANDLERS: dict[str, Handler] = {}


def handler(kind: str) -> Callable[[Handler], Handler]:
    """Register a function as the handler of a job kind."""

    def register(func: Handler) -> Handler:
        HANDLERS[kind] = func
        return func

    return register


def worker_name() -> str:
    return f"{socket.gethostname()}:{os.getpid()}:{threading.get_ident()}"


def run_one(session_factory: sessionmaker[Session], settings: Settings, worker: str) -> bool:
    """Claim and run one job; False when there was nothing to do. The entry point registers the
    handlers first (app/job_handlers.py)."""
    with session_factory() as session:
        job = service.claim(session, worker=worker, lease_seconds=settings.job_lease_seconds)
    if job is None:
        return False
    context = JobContext(job=job, session_factory=session_factory, settings=settings, worker=worker)
    try:
        _run_claimed(context)
    finally:
        # a ranking's arrays (tens to hundreds of MB) are freed on the job's threads: hand the
        # pages back so a worker does not keep the largest job it ever ran (app.shared.allocator)
        release_free_memory()
    return True


def _run_claimed(context: JobContext) -> None:
    """Run a claimed job's handler and record how it ended."""
    job, session_factory, worker = context.job, context.session_factory, context.worker
    func = HANDLERS.get(job.kind)
    try:
        if func is None:
            raise ExpertloopError(f"no handler for job kind '{job.kind}'")
        result = func(context)
    except JobLost:
        log.warning("job %s lost to another worker", job.id)
        return
    except ExpertloopError as exc:
        with session_factory.begin() as session:
            service.fail(session, job_id=job.id, worker=worker, message=exc.message)
        return
    except Exception as exc:  # a bug: record it on the job so the user sees it, and log it
        log.exception("job %s failed", job.id)
        with session_factory.begin() as session:
            service.fail(
                session, job_id=job.id, worker=worker, message=f"{type(exc).__name__}: {exc}"
            )
        return
    with session_factory.begin() as session:
        service.finish(session, job_id=job.id, worker=worker, result=result)


def run_until_stopped(
    session_factory: sessionmaker[Session],
    settings: Settings,
    stop: threading.Event,
    poll_seconds: float = 0.5,
) -> None:
    """Keep running jobs until `stop` is set; back off while the store is unreachable."""
    name = worker_name()
    while not stop.is_set():
        try:
            busy = run_one(session_factory, settings, name)
        except Exception:  # database down or similar: wait and retry, never die
            log.exception("job loop error; retrying")
            busy = False
            stop.wait(min(5.0, poll_seconds * 4))
        if not busy:
            stop.wait(poll_seconds)


class JobThread:
    """Embedded mode: one background thread of the server runs jobs."""

    def __init__(self, session_factory: sessionmaker[Session], settings: Settings) -> None:
        self._stop = threading.Event()
        self._thread = threading.Thread(
            target=run_until_stopped,
            args=(session_factory, settings, self._stop),
            name="expertloop-jobs",
            daemon=True,
        )

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(timeout=30)
