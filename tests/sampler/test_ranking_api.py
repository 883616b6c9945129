"""Ranking through the API: a background job, a selection that keeps budget, gap and audit share."""

from __future__ import annotations

import numpy as np
import pytest
from sqlalchemy import func, select

from expertloop.ingest.models import CONTROL_EXPERT, Step
from expertloop.jobs import runner
from expertloop.queue.models import QueueItem
from tests.conftest import store_contents
from tests.helpers import DISCRETE_SPEC, discrete_rows, parquet_bytes

SLUG = "aisle-crossing"


def _upload(client, headers, cols, number):
    response = client.post(
        f"/api/loops/{SLUG}/rounds/{number}/rollouts",
        files={"file": ("f.parquet", parquet_bytes(cols))},
        headers=headers,
    )
    assert response.status_code == 201, response.text


@pytest.fixture
def ranked_round(client, admin, uploader):
    client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin)
    _upload(client, uploader, discrete_rows(4, 30, expert=True, prefix="demo", seed=1), 0)
    run = discrete_rows(6, 50, seed=2)
    for i in (45, 46, 47):  # an expert takeover at the end of rollout r0
        run["control"][i] = "expert"
        run["expert_action"][i] = "hold"
    _upload(client, uploader, run, 1)
    return run


def _rank(client, app, settings, admin, budget=20, seed=7):
    started = client.post(
        f"/api/loops/{SLUG}/rounds/1/ranking", json={"budget": budget, "seed": seed}, headers=admin
    )
    assert started.status_code == 202, started.text
    assert started.json()["job"]["status"] == "queued"
    assert runner.run_one(app.state.session_factory, settings, "test-worker")
    job = client.get(f"/api/jobs/{started.json()['job']['id']}", headers=admin).json()
    assert job["status"] == "done", job
    assert job["progress"] == 1.0
    return job


def test_ranking_job_fills_selection_and_queue(client, app, settings, admin, ranked_round):
    job = _rank(client, app, settings, admin)
    assert job["result"]["chosen"] == 20 and job["result"]["audit"] == 2  # 10% of 20
    assert job["result"]["uncertainty_method"] == "entropy"
    assert job["result"]["candidates"] == 300 - 3  # expert-driven steps are never candidates
    selection = client.get(f"/api/loops/{SLUG}/rounds/1/selection", headers=admin).json()
    assert selection["total"] == 20 and selection["seed"] == 7
    reasons = [i["reason"] for i in selection["items"]]
    assert reasons.count("audit") == 2 and reasons.count("ranked") == 18
    for item in selection["items"]:
        assert 0 < item["novelty_pct"] <= 1 and 0 < item["uncertainty_pct"] <= 1
    # the gap rule: ranked picks of one rollout are at least min_gap_steps (10 steps, 1 s at
    # 10 Hz) apart from every pick
    by_rollout: dict[str, list[float]] = {}
    for item in selection["items"]:
        by_rollout.setdefault(item["rollout"], []).append((item["time_s"], item["reason"]))
    for picks in by_rollout.values():
        for t, reason in picks:
            if reason == "ranked":
                others = [u for u, _ in picks if u != t]
                assert all(abs(t - u) >= 1.0 - 1e-9 for u in others)
    with app.state.session_factory() as session:
        chosen = {i["step_id"] for i in selection["items"]}
        controls = session.scalars(select(Step.control).where(Step.id.in_(chosen))).all()
        assert CONTROL_EXPERT not in controls
        assert session.scalar(select(func.count()).select_from(QueueItem)) == 20


def test_same_seed_same_selection(client, app, settings, admin, ranked_round):
    _rank(client, app, settings, admin, seed=11)
    first = client.get(f"/api/loops/{SLUG}/rounds/1/selection", headers=admin).json()["items"]
    _rank(client, app, settings, admin, seed=11)
    again = client.get(f"/api/loops/{SLUG}/rounds/1/selection", headers=admin).json()["items"]
    assert [(i["step_id"], i["reason"]) for i in first] == [
        (i["step_id"], i["reason"]) for i in again
    ]
    _rank(client, app, settings, admin, seed=12)
    other = client.get(f"/api/loops/{SLUG}/rounds/1/selection", headers=admin).json()["items"]
    audit = lambda items: {i["step_id"] for i in items if i["reason"] == "audit"}  # noqa: E731
    assert audit(first) != audit(other)


def test_takeover_boost_lifts_states_just_before_a_takeover(
    client, app, settings, admin, ranked_round
):
    _rank(client, app, settings, admin)
    items = client.get(f"/api/loops/{SLUG}/rounds/1/selection", headers=admin).json()["items"]
    with app.state.session_factory() as session:
        from expertloop.sampler.models import Selection
        from expertloop.sampler.service import candidate_scores

        scores = candidate_scores(session.scalars(select(Selection)).one())
    boosted = scores["boost"] > 0
    # r0's takeover starts at step 45 (4.5 s); the window is 3 s: steps 15..44 of r0... only
    # learner steps within (1.5 s, 4.5 s) of it: 30 steps at 10 Hz
    assert int(boosted.sum()) == 30
    assert any(i["boost"] > 0 for i in items)


def test_second_request_while_one_is_queued_is_409(client, admin, ranked_round, engine):
    first = client.post(f"/api/loops/{SLUG}/rounds/1/ranking", json={"budget": 5}, headers=admin)
    assert first.status_code == 202
    before = store_contents(engine)
    second = client.post(f"/api/loops/{SLUG}/rounds/1/ranking", json={"budget": 5}, headers=admin)
    assert second.status_code == 409 and "already queued or running" in second.json()["detail"]
    assert store_contents(engine) == before


@pytest.mark.parametrize(
    "number,body,status,words",
    [
        (0, {"budget": 5}, 422, "round 0 holds demonstrations"),
        (1, {"budget": 0}, 422, "budget"),
        (1, {"budget": 5, "surprise": 1}, 422, "surprise"),
        (9, {"budget": 5}, 404, "round 9"),
        (2, {"budget": 5}, 422, "no rollouts yet"),
    ],
)
def test_bad_ranking_requests(client, admin, ranked_round, engine, number, body, status, words):
    client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v2"}, headers=admin)
    before = store_contents(engine)
    response = client.post(f"/api/loops/{SLUG}/rounds/{number}/ranking", json=body, headers=admin)
    assert response.status_code == status and words in response.json()["detail"], response.text
    assert store_contents(engine) == before


def test_round_without_learner_outputs_ranks_on_novelty_alone(
    client, app, settings, admin, uploader
):
    client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin)
    _upload(client, uploader, discrete_rows(2, 20, expert=True, prefix="demo"), 0)
    plain = discrete_rows(2, 20, prefix="plain")
    for col in ("learner_probs", "learner_action", "expert_action"):
        del plain[col]
    _upload(client, uploader, plain, 1)
    job = _rank(client, app, settings, admin, budget=6)
    assert job["result"]["uncertainty_method"] == "novelty only"
    assert any("novelty alone" in n for n in job["result"]["notes"])
    items = client.get(f"/api/loops/{SLUG}/rounds/1/selection", headers=admin).json()["items"]
    assert all(i["uncertainty"] is None for i in items)
    assert np.isfinite([i["novelty"] for i in items]).all()
