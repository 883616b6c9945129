"""Every background job kind with its handler, registered by the entry points (server, worker,
demo set-up) before jobs run.

A job that spans stages is put together here, above them: the ranking stores the sampler's
selection and fills the queue from it in one transaction, while the sampler itself knows
nothing of the queue.
"""

from __future__ import annotations

from functools import partial

from .jobs.runner import HANDLERS
from .queue import service as queue_service
from .sampler import cores
from .sampler import jobs as sampler_jobs
from .sampler.service import RANK_JOB


def register_job_handlers() -> None:
    """Register every handler (idempotent)."""
    # Before anything in a process that ranks loads an OpenMP runtime (the faiss and
    # scikit-learn wheels share one libgomp, and the first to load it fixes how it waits).
    cores.prefer_passive_waiting()
    HANDLERS[RANK_JOB] = partial(
        sampler_jobs.rank_job, fill_queue=queue_service.replace_round_queue
    )
