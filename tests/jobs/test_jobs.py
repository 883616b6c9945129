"""Jobs: claims never hand one job to two workers; a job whose worker died is taken over."""

from __future__ import annotations

import threading
from datetime import timedelta

import pytest
from sqlalchemy import update

from expertloop.jobs import runner, service
from expertloop.jobs.models import JOB_DONE, JOB_FAILED, JOB_RUNNING, Job
from expertloop.models import utcnow


@pytest.fixture
def echo_handler():
    calls: list[int] = []

    @runner.handler("test-echo")
    def echo(ctx: runner.JobContext) -> dict:
        calls.append(ctx.job.id)
        ctx.progress(0.5, force=True)
        return {"echo": ctx.job.params["value"] * 2}

    yield calls
    runner.HANDLERS.pop("test-echo", None)


def test_enqueue_claim_finish(app, settings, echo_handler):
    factory = app.state.session_factory
    with factory.begin() as session:
        job = service.enqueue(session, kind="test-echo", params={"value": 21})
    assert runner.run_one(factory, settings, "w1") is True
    with factory() as session:
        done = service.get_job(session, job_id=job.id)
        assert (done.status, done.result, done.progress, done.attempts) == (
            JOB_DONE,
            {"echo": 42},
            1.0,
            1,
        )
    assert runner.run_one(factory, settings, "w1") is False


def test_second_live_job_for_a_round_is_a_conflict(app, client, admin):
    from expertloop.errors import Conflict
    from tests.helpers import DISCRETE_SPEC

    client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    with app.state.session_factory() as session:
        service.enqueue(session, kind="rank", params={}, round_id=1)
        with pytest.raises(Conflict):
            service.enqueue(session, kind="rank", params={}, round_id=1)
        # another kind, or the same kind once the first has ended, is fine
        service.enqueue(session, kind="report", params={}, round_id=1)


def test_failed_handler_records_its_message(app, settings):
    from expertloop.errors import InvalidInput

    @runner.handler("test-fail")
    def fail(ctx):
        raise InvalidInput("the round has no learner-driven states to rank")

    try:
        factory = app.state.session_factory
        with factory.begin() as session:
            job = service.enqueue(session, kind="test-fail", params={})
        runner.run_one(factory, settings, "w1")
        with factory() as session:
            failed = service.get_job(session, job_id=job.id)
            assert failed.status == JOB_FAILED and "no learner-driven states" in failed.message
    finally:
        runner.HANDLERS.pop("test-fail", None)


def test_expired_lease_is_taken_over_and_the_old_worker_loses_it(app, settings, echo_handler):
    factory = app.state.session_factory
    with factory() as session:
        job = service.enqueue(session, kind="test-echo", params={"value": 1})
        first = service.claim(session, worker="dead-worker")
        assert first is not None and first.id == job.id
        # nobody else can claim it while the lease is live
        assert service.claim(session, worker="other") is None
        session.execute(update(Job).values(lease_until=utcnow() - timedelta(seconds=1)))
        session.commit()
    assert runner.run_one(factory, settings, "w2") is True
    with factory() as session:
        done = service.get_job(session, job_id=job.id)
        assert done.status == JOB_DONE and done.attempts == 2 and done.worker == "w2"
        assert (
            service.heartbeat(session, job_id=job.id, worker="dead-worker", progress=0.9) is False
        )


def test_concurrent_claims_never_share_a_job(app):
    factory = app.state.session_factory
    with factory.begin() as session:
        for i in range(40):
            service.enqueue(session, kind="test-none", params={"i": i})
    claimed: list[int] = []
    errors: list[BaseException] = []
    lock = threading.Lock()

    def worker(name: str) -> None:
        try:
            with factory() as session:
                while (job := service.claim(session, worker=name)) is not None:
                    with lock:
                        claimed.append(job.id)
        except BaseException as exc:  # a failed claim must fail the test, not vanish
            errors.append(exc)

    threads = [threading.Thread(target=worker, args=(f"w{i}",)) for i in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert sorted(claimed) == list(range(1, 41))  # every job once, none twice
    with factory() as session:
        assert all(j.status == JOB_RUNNING for j in session.query(Job))


def test_job_api_shows_progress(app, client, admin, echo_handler):
    with app.state.session_factory.begin() as session:
        job = service.enqueue(session, kind="test-echo", params={"value": 2})
    queued = client.get(f"/api/jobs/{job.id}", headers=admin).json()
    assert queued["status"] == "queued" and queued["progress"] == 0.0
    assert client.get("/api/jobs/999", headers=admin).status_code == 404


def test_free_pages_go_back_after_every_job_whatever_its_end(app, settings, monkeypatch):
    """A worker hands freed pages back after each job (app.shared.allocator), done or failed,
    so it does not keep the largest ranking it ever ran; with no job it does nothing."""
    from expertloop.errors import InvalidInput

    released = []
    monkeypatch.setattr(runner, "release_free_memory", lambda: released.append(1))

    @runner.handler("test-ok")
    def ok(ctx: runner.JobContext) -> dict:
        return {}

    @runner.handler("test-refused")
    def refused(ctx: runner.JobContext) -> dict:
        raise InvalidInput("no")

    try:
        factory = app.state.session_factory
        with factory.begin() as session:
            service.enqueue(session, kind="test-ok", params={})
            service.enqueue(session, kind="test-refused", params={})
        assert runner.run_one(factory, settings, "w1") is True
        assert runner.run_one(factory, settings, "w1") is True
        assert len(released) == 2
        assert runner.run_one(factory, settings, "w1") is False
        assert len(released) == 2
    finally:
        runner.HANDLERS.pop("test-ok", None)
        runner.HANDLERS.pop("test-refused", None)
