"""Store access for jobs: enqueue, claim with a lease, heartbeat, finish.

A claim is one UPDATE over a sub-select. On PostgreSQL the sub-select locks the row and skips
rows other workers hold (FOR UPDATE SKIP LOCKED); on SQLite a single UPDATE is atomic under the
database's one writer. Either way no two workers ever hold the same job.
"""

from __future__ import annotations

from datetime import timedelta
from typing import Any

from sqlalchemy import or_, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from ..db import write_transaction
from ..errors import Conflict, NotFound
from ..models import utcnow
from .models import JOB_DONE, JOB_FAILED, JOB_QUEUED, JOB_RUNNING, Job

DEFAULT_LEASE_SECONDS = 30.0


def enqueue(
    session: Session,
    *,
    kind: str,
    params: dict[str, Any],
    loop_id: int | None = None,
    round_id: int | None = None,
    user_id: int | None = None,
) -> Job:
    """Queue a job; a live job of the same kind for the same round is a conflict (409)."""
    job = Job(
        kind=kind,
        params=params,
        loop_id=loop_id,
        round_id=round_id,
        created_by=user_id,
        status=JOB_QUEUED,
        progress=0.0,
        attempts=0,
    )
    try:
        # a savepoint: a refused insert leaves the caller's transaction as it was
        with session.begin_nested():
            session.add(job)
    except IntegrityError as exc:
        live = session.scalar(
            select(Job.id).where(
                Job.kind == kind,
                Job.round_id == round_id,
                Job.status.in_((JOB_QUEUED, JOB_RUNNING)),
            )
        )
        raise Conflict(
            f"a {kind} job for this round is already queued or running (job {live})"
        ) from exc
    return job


def get_job(session: Session, *, job_id: int) -> Job:
    """A job by id, or NotFound."""
    job = session.get(Job, job_id)
    if job is None:
        raise NotFound(f"no job {job_id}")
    return job


def claim(
    session: Session, *, worker: str, lease_seconds: float = DEFAULT_LEASE_SECONDS
) -> Job | None:
    """Take the oldest queued job, or a running one whose worker stopped renewing its lease."""
    now = utcnow()
    claimable = (
        select(Job.id)
        .where(
            or_(
                Job.status == JOB_QUEUED,
                (Job.status == JOB_RUNNING) & (Job.lease_until < now),
            )
        )
        .order_by(Job.id)
        .limit(1)
    )
    if session.get_bind().dialect.name == "postgresql":
        claimable = claimable.with_for_update(skip_locked=True)
    with write_transaction(session):
        job_id = session.scalar(
            update(Job)
            .where(Job.id == claimable.scalar_subquery())
            .values(
                status=JOB_RUNNING,
                worker=worker,
                lease_until=now + timedelta(seconds=lease_seconds),
                attempts=Job.attempts + 1,
                started_at=now,
            )
            .returning(Job.id)
        )
    if job_id is None:
        return None
    session.expire_all()
    job = session.get(Job, job_id)
    session.commit()  # end the read: a stale SQLite read transaction could not write later
    return job


def heartbeat(
    session: Session,
    *,
    job_id: int,
    worker: str,
    progress: float,
    lease_seconds: float = DEFAULT_LEASE_SECONDS,
) -> bool:
    """Renew the lease and record progress; False if this worker no longer holds the job."""
    result = session.execute(
        update(Job)
        .where(Job.id == job_id, Job.worker == worker, Job.status == JOB_RUNNING)
        .values(
            progress=min(max(progress, 0.0), 1.0),
            lease_until=utcnow() + timedelta(seconds=lease_seconds),
        )
    )
    return bool(result.rowcount)  # type: ignore[attr-defined]


def finish(session: Session, *, job_id: int, worker: str, result: dict[str, Any]) -> bool:
    """Mark a held job done with its result; False if another worker took it over."""
    updated = session.execute(
        update(Job)
        .where(Job.id == job_id, Job.worker == worker, Job.status == JOB_RUNNING)
        .values(status=JOB_DONE, progress=1.0, result=result, finished_at=utcnow(), message=None)
    )
    return bool(updated.rowcount)  # type: ignore[attr-defined]


def fail(session: Session, *, job_id: int, worker: str, message: str) -> None:
    """Mark a held job failed with a message a person can act on."""
    session.execute(
        update(Job)
        .where(Job.id == job_id, Job.worker == worker, Job.status == JOB_RUNNING)
        .values(status=JOB_FAILED, message=message[:2000], finished_at=utcnow())
    )
