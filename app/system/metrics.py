"""Prometheus metrics. Store-wide counts are read from the database at scrape time, so every
process reports the same truth; latencies are observed in the process that served them."""

from __future__ import annotations

from collections.abc import Iterator

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector
from sqlalchemy import Engine, func, select
from sqlalchemy.orm import Session

from ..ingest.models import Step
from ..jobs.models import Job
from ..loops.models import Loop, Round
from ..queue.metrics import CLAIM_SECONDS
from ..queue.models import ANSWER_UNDONE, ITEM_OPEN, Label, QueueItem


class StoreCollector(Collector):
    """Counts read from the store: steps, labels, queue depth per loop, jobs by kind and status."""

    def __init__(self, engine: Engine) -> None:
        self._engine = engine

    def collect(self) -> Iterator[Metric]:
        with Session(self._engine) as session:
            steps = session.scalar(select(func.count()).select_from(Step)) or 0
            labels = (
                session.scalar(
                    select(func.count())
                    .select_from(Label)
                    .where(Label.answer != ANSWER_UNDONE)  # an undo is no label
                )
                or 0
            )
            depth = session.execute(
                select(Loop.slug, func.count(QueueItem.id))
                .join(Round, Round.loop_id == Loop.id)
                .join(QueueItem, QueueItem.round_id == Round.id)
                .where(QueueItem.status == ITEM_OPEN)
                .group_by(Loop.slug)
            ).all()
            jobs = session.execute(
                select(Job.kind, Job.status, func.count()).group_by(Job.kind, Job.status)
            ).all()
            finished = session.execute(
                select(Job.kind, Job.started_at, Job.finished_at).where(
                    Job.finished_at.is_not(None), Job.started_at.is_not(None)
                )
            ).all()
        yield CounterMetricFamily("expertloop_steps_ingested", "Steps stored.", value=steps)
        yield CounterMetricFamily("expertloop_labels_submitted", "Labels stored.", value=labels)
        queue = GaugeMetricFamily(
            "expertloop_queue_depth", "Open queue items per loop.", labels=["loop"]
        )
        for slug, count in depth:
            queue.add_metric([slug], count)
        yield queue
        by_status = GaugeMetricFamily(
            "expertloop_jobs", "Jobs by kind and status.", labels=["kind", "status"]
        )
        for kind, status, count in jobs:
            by_status.add_metric([kind, status], count)
        yield by_status
        durations: dict[str, list[float]] = {}
        for kind, started, ended in finished:
            if started is not None and ended is not None:  # the query excludes NULLs; for mypy
                durations.setdefault(kind, []).append((ended - started).total_seconds())
        seconds = GaugeMetricFamily(
            "expertloop_job_seconds_total", "Time spent in finished jobs, by kind.", labels=["kind"]
        )
        for kind, values in durations.items():
            seconds.add_metric([kind], sum(values))
        yield seconds


def render(engine: Engine) -> bytes:
    """The metrics page in Prometheus text format."""
    registry = CollectorRegistry()
    registry.register(StoreCollector(engine))
    registry.register(CLAIM_SECONDS)
    return generate_latest(registry)
