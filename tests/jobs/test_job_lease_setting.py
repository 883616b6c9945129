"""EXPERTLOOP_JOB_LEASE_SECONDS: the lease a worker takes and renews, and how often it renews."""

from __future__ import annotations

from datetime import UTC

import pytest
from pydantic import ValidationError

from expertloop.config import Settings
from expertloop.jobs import runner, service
from expertloop.models import utcnow


def test_heartbeat_interval_gives_three_renewals_per_lease_and_at_most_five_seconds() -> None:
    assert runner.heartbeat_interval(30.0) == 5.0  # the default lease keeps the 5 s cadence
    assert runner.heartbeat_interval(9.0) == 3.0
    assert runner.heartbeat_interval(3.0) == 1.0


def test_lease_setting_is_validated() -> None:
    assert Settings.model_fields["job_lease_seconds"].default == service.DEFAULT_LEASE_SECONDS
    with pytest.raises(ValidationError):
        Settings(job_lease_seconds=1)


def test_claims_and_heartbeats_use_the_configured_lease(app, settings) -> None:
    factory = app.state.session_factory
    short = settings.model_copy(update={"job_lease_seconds": 12.0})
    leases: list[float] = []

    @runner.handler("test-lease")
    def measure(ctx: runner.JobContext) -> dict:
        with factory() as session:
            claimed = service.get_job(session, job_id=ctx.job.id).lease_until
        ctx.progress(0.5, force=True)
        with factory() as session:
            renewed = service.get_job(session, job_id=ctx.job.id).lease_until
        for until in (claimed, renewed):
            until = until if until.tzinfo else until.replace(tzinfo=UTC)  # SQLite drops it
            leases.append((until - utcnow()).total_seconds())
        return {}

    try:
        with factory.begin() as session:
            service.enqueue(session, kind="test-lease", params={})
        assert runner.run_one(factory, short, "w1")
    finally:
        runner.HANDLERS.pop("test-lease", None)
    # both the claim and the renewal reach about 12 s ahead, not the 30 s default
    assert len(leases) == 2 and all(6.0 < left <= 12.0 for left in leases), leases
