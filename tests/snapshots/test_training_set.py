"""The training-set definition: demonstrations + takeovers + consensus relabels, pinned by cut-offs."""

from __future__ import annotations

import numpy as np
from sqlalchemy import select

from expertloop.ingest.models import Step
from expertloop.loops import service as loops_service
from expertloop.loops.spec import spec_of
from expertloop.queue.models import ANSWER_ACTION, ANSWER_UNSURE, Label
from expertloop.shared import training_set as ts
from tests.helpers import DISCRETE_SPEC, discrete_rows, parquet_bytes


def _setup(client, admin, uploader):
    client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    client.post("/api/loops/aisle-crossing/rounds", json={"learner_version": "v1"}, headers=admin)
    demos = discrete_rows(1, 3, expert=True, prefix="demo")
    r = client.post(
        "/api/loops/aisle-crossing/rounds/0/rollouts",
        files={"file": ("d.parquet", parquet_bytes(demos))},
        headers=uploader,
    )
    assert r.status_code == 201
    run = discrete_rows(1, 4, prefix="run")
    run["control"][3] = "expert"
    run["expert_action"][3] = "hold"
    r = client.post(
        "/api/loops/aisle-crossing/rounds/1/rollouts",
        files={"file": ("r.parquet", parquet_bytes(run))},
        headers=uploader,
    )
    assert r.status_code == 201


def _label(session, step_id, round_id, user_id, answer, action, n):
    session.add(
        Label(
            step_id=step_id,
            round_id=round_id,
            user_id=user_id,
            submission_id=f"s{n}",
            answer=answer,
            action=action,
        )
    )


def test_members_sources_actions_and_cutoff(app, client, admin, uploader, make_user):
    _setup(client, admin, uploader)
    make_user("annotator", name="third-voter")  # three annotators: one vote each per state
    from expertloop.auth.models import User

    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug="aisle-crossing")
        round1 = loops_service.get_round(session, loop=loop, number=1)
        users = [u.id for u in session.scalars(select(User))]
        steps = session.execute(select(Step.id, Step.round_id).order_by(Step.id)).all()
        learner_steps = [s for s, rid in steps if rid == round1.id][:3]
        # step A: 2 votes creep vs 1 hold -> creep; step B: tie -> unresolved; step C: only unsure
        a, b, c = learner_steps
        _label(session, a, round1.id, users[0], ANSWER_ACTION, 1, 1)
        _label(session, a, round1.id, users[1], ANSWER_ACTION, 1, 2)
        _label(session, a, round1.id, users[2], ANSWER_ACTION, 2, 3)
        _label(session, b, round1.id, users[0], ANSWER_ACTION, 0, 4)
        _label(session, b, round1.id, users[1], ANSWER_ACTION, 2, 5)
        _label(session, c, round1.id, users[0], ANSWER_UNSURE, None, 6)
        session.commit()
        cutoff = ts.current_cutoff(session, loop=loop, up_to_round=1)
        spec = spec_of(loop)
        rows = ts.members(session, loop=loop, spec=spec, cutoff=cutoff)
        sources = [ts.SOURCES[i] for i in rows.source]
        # 3 demonstrations, 1 takeover, 1 relabel (a); b (tie) and c (unsure only) are left out
        assert sources.count("demonstration") == 3
        assert sources.count("takeover") == 1
        assert sources.count("relabel") == 1
        relabel_at = sources.index("relabel")
        assert rows.step_id[relabel_at] == a and rows.action[relabel_at] == 1
        assert rows.label_count[relabel_at] == 3
        np.testing.assert_allclose(rows.agreement[relabel_at], 2 / 3)
        assert list(rows.step_id) == sorted(rows.step_id)
        takeover_at = sources.index("takeover")
        assert rows.action[takeover_at] == 2  # "hold"
        # up to round 0 only demonstrations
        only_demos = ts.members(
            session,
            loop=loop,
            spec=spec,
            cutoff=ts.current_cutoff(session, loop=loop, up_to_round=0),
        )
        assert {ts.SOURCES[i] for i in only_demos.source} == {"demonstration"}
        # a later label does not change the pinned version
        _label(session, b, round1.id, users[2], ANSWER_ACTION, 0, 7)
        session.commit()
        assert len(ts.members(session, loop=loop, spec=spec, cutoff=cutoff)) == len(rows)
        newer = ts.members(
            session,
            loop=loop,
            spec=spec,
            cutoff=ts.current_cutoff(session, loop=loop, up_to_round=1),
        )
        assert len(newer) == len(rows) + 1
        ids, features = ts.training_features(session, loop=loop, spec=spec, cutoff=cutoff)
        assert features.shape == (5, 3) and features.dtype == np.float32
        np.testing.assert_array_equal(ids, rows.step_id)
