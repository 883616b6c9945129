"""HTTP route to follow a background job."""

from __future__ import annotations

from fastapi import APIRouter

from ..deps import ReaderDep, SessionDep
from ..limits import RowId
from . import service
from .schemas import JobRead

router = APIRouter(prefix="/api/jobs", tags=["jobs"])


@router.get("/{job_id}", response_model=JobRead)
def read_job(job_id: RowId, session: SessionDep, _: ReaderDep) -> JobRead:
    """A job's status and progress (queued, running with a fraction done, done, failed)."""
    return JobRead.model_validate(service.get_job(session, job_id=job_id))
