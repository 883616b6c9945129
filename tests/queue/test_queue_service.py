"""The queue's rules, called directly with a chosen clock: leases, expiry, skips, unsure answers,
idempotent submits, k labels from k annotators, span labels, and refusals that change nothing."""

from __future__ import annotations

import json
from dataclasses import replace
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from sqlalchemy import event, select, text, update

from expertloop.errors import Conflict, InvalidInput, NotFound
from expertloop.ingest.models import Step
from expertloop.loops import service as loops_service
from expertloop.loops.spec import spec_of
from expertloop.queue import service
from expertloop.queue.models import (
    ANSWER_UNSURE,
    ITEM_DONE,
    ITEM_OPEN,
    Label,
    Lease,
    QueueItem,
    Skip,
)
from expertloop.sampler.models import REASON_AUDIT, REASON_RANKED, SelectedState, Selection
from expertloop.shared import training_set as ts
from tests.conftest import store_contents
from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC, discrete_rows, parquet_bytes
from tests.queue.conftest import user_id
from tests.serving import enqueue_steps

T0 = datetime(2026, 12, 2, 9, 0, tzinfo=UTC)


@pytest.fixture
def session(app):
    with app.state.session_factory() as s:
        yield s


@pytest.fixture
def annotators(app, make_user):
    """Ids of four annotators a, b, c, d."""
    for name in "abcd":
        make_user("annotator", name=name)
    return {name: user_id(app, name) for name in "abcd"}


def loop_of(session, slug="aisle-crossing"):
    return loops_service.get_loop(session, slug=slug)


def items(session, slug="aisle-crossing"):
    loop = loop_of(session, slug)
    rnd = loops_service.get_round(session, loop=loop, number=1)
    return list(
        session.scalars(
            select(QueueItem)
            .where(QueueItem.round_id == rnd.id)
            .order_by(QueueItem.position)
            .execution_options(populate_existing=True)
        )
    )


def claim(session, who, now=T0, slug="aisle-crossing"):
    return service.claim_next(session, loop=loop_of(session, slug), user_id=who, now=now)


def answer(session, who, item_id, sid, action=0, now=T0, slug="aisle-crossing", **extra):
    kind = "unsure" if action is None else "action"
    return service.submit(
        session,
        loop=loop_of(session, slug),
        item_id=item_id,
        user_id=who,
        submission_id=sid,
        answer=extra.pop("answer", kind),
        action=action,
        now=now,
        **extra,
    )


def test_items_are_queued_in_order_with_labels_needed_from_the_loop(make_loop, session):
    make_loop(DISCRETE_SPEC, settings={"labels_per_state": 2})
    queued = items(session)
    assert [q.position for q in queued] == list(range(20))
    assert [q.step_id for q in queued] == sorted(q.step_id for q in queued)
    assert {(q.labels_needed, q.labels_done, q.status) for q in queued} == {(2, 0, ITEM_OPEN)}


def test_learner_shown_items_are_drawn_from_the_seed(make_loop, session):
    make_loop(DISCRETE_SPEC, settings={"show_learner_fraction": 0.5}, seed=42)
    shown = [q.show_learner for q in items(session)]
    # one uniform draw per item in queue order from numpy's seeded generator (numpy docs:
    # Generator.random draws from [0, 1)); every discrete test step has a learner action
    expected = (np.random.default_rng(42).random(20) < 0.5).tolist()
    assert shown == expected
    assert 0 < sum(shown) < 20


def test_a_selection_is_queued_in_rank_order_with_audit_states_in_place(make_loop, session):
    slug = make_loop(DISCRETE_SPEC, queue=0)
    loop = loop_of(session, slug)
    rnd = loops_service.get_round(session, loop=loop, number=1)
    step_ids = list(session.scalars(select(Step.id).order_by(Step.id)))[:5]
    selection = Selection(
        round_id=rnd.id, budget=5, seed=7, params={}, n_candidates=20, n_training=0
    )
    session.add(selection)
    session.flush()
    reasons = [REASON_RANKED, REASON_AUDIT, REASON_RANKED, REASON_AUDIT, REASON_RANKED]
    ranks = [3, 0, 4, 1, 2]
    for step_id, rank, reason in zip(step_ids, ranks, reasons, strict=True):
        session.add(
            SelectedState(
                selection_id=selection.id,
                step_id=step_id,
                rank=rank,
                reason=reason,
                novelty=0.0,
                novelty_pct=0.0,
                score=1.0 - rank / 10,
            )
        )
    session.flush()
    assert service.enqueue_selection(session, rnd=rnd, selection=selection, loop=loop) == 5
    session.commit()
    queued = items(session, slug)
    by_rank = [step_ids[ranks.index(r)] for r in range(5)]
    assert [q.step_id for q in queued] == by_rank
    # queueing the same selection again adds nothing
    assert service.enqueue_selection(session, rnd=rnd, selection=selection, loop=loop) == 0


def test_claims_follow_queue_order_and_a_holder_resumes_its_item(
    discrete_loop, session, annotators
):
    a, b = annotators["a"], annotators["b"]
    first = claim(session, a)
    second = claim(session, b)
    assert (first.item.position, second.item.position) == (0, 1)
    later = T0 + timedelta(seconds=100)
    again = claim(session, a, now=later)
    assert again.item.id == first.item.id
    assert again.expires_at == later + timedelta(seconds=300)  # lease_seconds default
    leases = session.scalars(select(Lease).where(Lease.user_id == a)).all()
    assert len(leases) == 1


def test_an_expired_lease_returns_the_item(discrete_loop, session, annotators, engine):
    a, b = annotators["a"], annotators["b"]
    held = claim(session, a)
    assert claim(session, b).item.id != held.item.id  # still leased to a
    answer(session, b, claim(session, b).item.id, "b-answer-0001")
    after = T0 + timedelta(seconds=301)
    taken = claim(session, b, now=after)
    assert taken.item.id == held.item.id
    before = store_contents(engine)
    with pytest.raises(Conflict, match="no live claim"):
        answer(session, a, held.item.id, "a-late-answer-01", now=after)
    assert store_contents(engine) == before


def test_a_skipped_item_is_not_offered_again_to_that_annotator(discrete_loop, session, annotators):
    a, b = annotators["a"], annotators["b"]
    first = claim(session, a)
    service.skip(session, loop=loop_of(session), item_id=first.item.id, user_id=a, now=T0)
    service.skip(session, loop=loop_of(session), item_id=first.item.id, user_id=a, now=T0)
    assert session.scalar(select(Skip.id).where(Skip.user_id == a)) is not None
    assert len(session.scalars(select(Skip)).all()) == 1  # skipping twice records one skip
    offered = []
    for n in range(19):
        got = claim(session, a)
        offered.append(got.item.id)
        answer(session, a, got.item.id, f"a-answer-{n:04d}")
    assert first.item.id not in offered
    assert claim(session, a) is None
    assert claim(session, b).item.id == first.item.id  # others still get it


def test_unsure_is_an_answer_and_counts_as_a_label(discrete_loop, session, annotators):
    a = annotators["a"]
    got = claim(session, a)
    done = answer(session, a, got.item.id, "unsure-00000001", action=None)
    stored = session.scalar(select(Label).where(Label.id == done.label.id))
    assert (stored.answer, stored.action, stored.action_vec) == (ANSWER_UNSURE, None, None)
    item = session.get(QueueItem, got.item.id, populate_existing=True)
    assert (item.labels_done, item.status) == (1, ITEM_DONE)


def test_a_double_submit_stores_one_label(discrete_loop, session, annotators, engine):
    a = annotators["a"]
    got = claim(session, a)
    first = answer(session, a, got.item.id, "double-submit-01", action=2)
    before = store_contents(engine)
    again = answer(session, a, got.item.id, "double-submit-01", action=2)
    assert store_contents(engine) == before
    assert (again.repeated, again.label.id) == (True, first.label.id)
    assert session.scalars(select(Label)).all() == [first.label]
    other = claim(session, a)
    holding = store_contents(engine)
    with pytest.raises(Conflict, match="already used"):
        answer(session, a, other.item.id, "double-submit-01", action=1)
    assert store_contents(engine) == holding


def test_k_labels_come_from_k_different_annotators(make_loop, session, annotators):
    make_loop(DISCRETE_SPEC, settings={"labels_per_state": 3}, queue=2)
    a, b, c, d = (annotators[n] for n in "abcd")
    claims = {who: claim(session, who) for who in (a, b, c, d)}
    first, second = items(session)
    assert {w: cl.item.id for w, cl in claims.items()} == {
        a: first.id,
        b: first.id,
        c: first.id,
        d: second.id,
    }
    for n, who in enumerate((a, b, c)):
        answer(session, who, first.id, f"k-label-{n:05d}", action=n)
    # a labelled the first item: it gets the second, never the first again
    assert claim(session, a).item.id == second.id
    with pytest.raises(Conflict, match="already labelled"):
        answer(session, a, first.id, "k-label-again-1", action=0)
    first = items(session)[0]
    users = session.scalars(select(Label.user_id).where(Label.item_id == first.id)).all()
    assert sorted(users) == sorted([a, b, c])
    assert (first.labels_done, first.status) == (3, ITEM_DONE)
    assert session.scalars(select(Lease).where(Lease.item_id == first.id)).all() == []


@pytest.mark.parametrize(
    ("spec", "kwargs", "message"),
    [
        (DISCRETE_SPEC, {"action": 3}, r"action: index 3 is out of range"),
        (DISCRETE_SPEC, {"action": -1}, r"action: index -1 is out of range"),
        (DISCRETE_SPEC, {"action": [0.5]}, r"action: a discrete action is an index"),
        (DISCRETE_SPEC, {"action": None, "answer": "action"}, r"action: required"),
        (DISCRETE_SPEC, {"action": 1, "answer": "unsure"}, r"action: leave it empty"),
        (DISCRETE_SPEC, {"action": 1, "answer": "maybe"}, r"answer: expected"),
        (DISCRETE_SPEC, {"action": 1, "span_steps": 2}, r"span_steps: span labels are off"),
        (DISCRETE_SPEC, {"action": 1, "seconds_spent": -1.0}, r"seconds_spent"),
        (DISCRETE_SPEC, {"action": 1, "sid": "short"}, r"submission_id"),
        (DISCRETE_SPEC, {"action": 1, "sid": "has spaces in it"}, r"submission_id"),
        (CONTINUOUS_SPEC, {"action": [1.0]}, r"action: expected 2 values"),
        (CONTINUOUS_SPEC, {"action": [2.5, 0.0]}, r"action\[0\] \(speed_cmd\): 2.5 is outside"),
        (CONTINUOUS_SPEC, {"action": [1.0, -0.3]}, r"action\[1\] \(curvature\).*-0.2 to 0.2"),
        (CONTINUOUS_SPEC, {"action": [float("nan"), 0.0]}, r"action\[0\].*finite"),
        (CONTINUOUS_SPEC, {"action": [1.0, float("inf")]}, r"action\[1\].*finite"),
        (CONTINUOUS_SPEC, {"action": 1}, r"a continuous action is a list"),
    ],
)
def test_refused_answers_name_the_field_and_change_nothing(
    make_loop, session, annotators, engine, spec, kwargs, message
):
    slug = make_loop(spec)
    a = annotators["a"]
    got = claim(session, a, slug=slug)
    before = store_contents(engine)
    sid = kwargs.pop("sid", "refused-answer-1")
    with pytest.raises(InvalidInput, match=message):
        answer(session, a, got.item.id, sid, slug=slug, **kwargs)
    assert store_contents(engine) == before


def test_an_answer_beyond_float32_is_refused_on_a_loop_stored_with_wider_bounds(
    make_loop, session, annotators, engine
):
    """Loops are created with bounds within float32's range; one stored before that rule may
    have wider ones, and an answer within them but beyond float32 (docs/references.md,
    "Hostile input": largest finite about 3.4028235e38) was stored as infinity, failing every
    snapshot and report of the loop afterwards."""
    slug = make_loop(CONTINUOUS_SPEC)
    wide = {
        "kind": "continuous",
        "dimensions": [
            {"name": "speed_cmd", "low": -1e300, "high": 1e300, "unit": "m/s"},
            {"name": "curvature", "low": -0.2, "high": 0.2, "unit": "1/m"},
        ],
    }
    with engine.begin() as conn:  # the row as a loop created before the rule was stored
        conn.execute(
            text("UPDATE loops SET action_space = :space WHERE slug = :slug"),
            {"space": json.dumps(wide), "slug": slug},
        )
    session.expire_all()
    a = annotators["a"]
    got = claim(session, a, slug=slug)
    before = store_contents(engine)
    with pytest.raises(InvalidInput, match=r"action\[0\] \(speed_cmd\): 1e\+299 is beyond float32"):
        answer(session, a, got.item.id, "beyond-float32-1", action=[1e299, 0.0], slug=slug)
    assert store_contents(engine) == before


def test_a_continuous_answer_is_stored_as_float32(continuous_loop, session, annotators):
    a = annotators["a"]
    got = claim(session, a, slug="aisle-speed")
    done = answer(
        session, a, got.item.id, "continuous-0001", action=[1.25, -0.05], slug="aisle-speed"
    )
    stored = np.frombuffer(done.label.action_vec, dtype="<f4")
    np.testing.assert_array_equal(stored, np.array([1.25, -0.05], dtype=np.float32))
    assert done.label.action is None


def test_unknown_item_and_submit_without_a_lease_are_refused(
    discrete_loop, session, annotators, engine
):
    a, b = annotators["a"], annotators["b"]
    got = claim(session, a)
    before = store_contents(engine)
    with pytest.raises(NotFound):
        answer(session, a, 99_999, "unknown-item-01")
    with pytest.raises(Conflict, match="no live claim"):
        answer(session, b, got.item.id, "not-my-lease-01")
    assert store_contents(engine) == before


def test_renew_extends_and_a_lapsed_lease_is_retaken_only_if_free(
    discrete_loop, session, annotators
):
    a, b = annotators["a"], annotators["b"]
    loop = loop_of(session)
    got = claim(session, a)
    t1 = T0 + timedelta(seconds=200)
    assert service.renew(
        session, loop=loop, item_id=got.item.id, user_id=a, now=t1
    ) == t1 + timedelta(seconds=300)
    t2 = t1 + timedelta(seconds=301)  # lapsed, but nobody took it
    assert service.renew(
        session, loop=loop, item_id=got.item.id, user_id=a, now=t2
    ) == t2 + timedelta(seconds=300)
    t3 = t2 + timedelta(seconds=301)  # lapsed, and b takes it
    assert claim(session, b, now=t3).item.id == got.item.id
    with pytest.raises(Conflict, match="no longer free"):
        service.renew(session, loop=loop, item_id=got.item.id, user_id=a, now=t3)


def test_span_labels_cover_the_steps_just_before(make_loop, session, annotators, engine):
    make_loop(DISCRETE_SPEC, settings={"span_labels": True, "span_max_steps": 3})
    a = annotators["a"]
    loop = loop_of(session)
    queued = items(session)
    sixth = queued[5]  # rollout r0, step 5
    for n in range(5):  # a takes and labels the first five, reaching step 5
        got = claim(session, a)
        answer(session, a, got.item.id, f"span-prefix-{n:03d}", action=0)
    got = claim(session, a)
    assert got.item.id == sixth.id
    before = store_contents(engine)
    with pytest.raises(InvalidInput, match="span_steps: at most 3"):
        answer(session, a, sixth.id, "span-too-many-1", action=2, span_steps=4)
    assert store_contents(engine) == before
    done = answer(session, a, sixth.id, "span-answer-0001", action=2, span_steps=2)
    assert done.span_labels == 2
    spans = session.execute(
        select(Label, Step.step_index)
        .join(Step, Step.id == Label.step_id)
        .where(Label.span_anchor_id == done.label.id)
        .order_by(Step.step_index)
    ).all()
    assert [idx for _, idx in spans] == [3, 4]
    assert all(lab.span and lab.item_id is None and lab.action == 2 for lab, _ in spans)
    assert {lab.submission_id for lab, _ in spans} == {"span-answer-0001.1", "span-answer-0001.2"}
    item = session.get(QueueItem, sixth.id, populate_existing=True)
    assert item.labels_done == 1  # span labels do not fill queue items
    assert loop.settings["span_labels"] is True


def test_an_annotator_has_one_vote_per_state_beside_their_span_copies(
    make_loop, session, annotators
):
    """A span copy onto a state its author answered, or covered before, is no second vote: one
    annotator's answers used to tie (the state left out) or outvote each other on their own."""
    make_loop(
        DISCRETE_SPEC, settings={"span_labels": True, "span_max_steps": 3, "labels_per_state": 2}
    )
    a, b = annotators["a"], annotators["b"]
    loop = loop_of(session)
    queued = items(session)  # rollout r0 steps 0..9, then r1
    for n in range(5):  # a answers steps 0..4 directly: 0 proceed
        got = claim(session, a)
        answer(session, a, got.item.id, f"one-vote-a-{n:03d}", action=0)
    got = claim(session, a)  # step 5: hold, copied onto steps 2..4
    answer(session, a, got.item.id, "one-vote-a-005", action=2, span_steps=3)
    got = claim(session, a)  # step 6: creep, copied onto steps 3..5
    answer(session, a, got.item.id, "one-vote-a-006", action=1, span_steps=3)
    got = claim(session, b)  # b answers step 0 with creep: a 1-1 split of two annotators
    assert got.item.id == queued[0].id
    answer(session, b, got.item.id, "one-vote-b-000", action=1)
    session.commit()
    step_of = {item.step_id: n for n, item in enumerate(queued[:7])}
    cutoff = ts.current_cutoff(session, loop=loop, up_to_round=1)
    found = ts.relabels(session, loop=loop, spec=spec_of(loop), cutoff=cutoff)
    by_step = {
        step_of[int(s)]: (int(act), int(n), float(agree))
        for s, act, n, agree, ok in zip(
            found.step_id,
            found.action,
            found.label_count,
            found.agreement,
            found.resolved,
            strict=True,
        )
        if ok
    }
    # steps 1..4 keep a's direct answer; step 5 a's direct hold (the creep copy does not vote);
    # step 6 a's creep; step 0 is a tie of two people, left out
    assert by_step == {
        1: (0, 1, 1.0),
        2: (0, 1, 1.0),
        3: (0, 1, 1.0),
        4: (0, 1, 1.0),
        5: (2, 1, 1.0),
        6: (1, 1, 1.0),
    }
    # versions and rankings made before the rule read every label, as they were hashed
    legacy = ts.relabels(
        session, loop=loop, spec=spec_of(loop), cutoff=replace(cutoff, one_vote_each=False)
    )
    legacy_count = dict(zip(legacy.step_id.tolist(), legacy.label_count.tolist(), strict=True))
    assert [legacy_count[queued[n].step_id] for n in range(7)] == [2, 1, 2, 3, 3, 2, 1]


def test_a_span_reaching_before_the_rollout_start_is_refused(make_loop, session, annotators):
    make_loop(DISCRETE_SPEC, settings={"span_labels": True, "span_max_steps": 5})
    a = annotators["a"]
    got = claim(session, a)
    got = claim(session, a)  # resumes the first item: step 0 of its rollout
    with pytest.raises(InvalidInput, match="only 0 steps precede"):
        answer(session, a, got.item.id, "span-at-start-01", action=1, span_steps=1)


def test_progress_counts_today_and_the_pace(discrete_loop, session, annotators):
    a = annotators["a"]
    loop = loop_of(session)
    for n in range(3):
        now = T0 + timedelta(seconds=10 * n)
        got = claim(session, a, now=now)
        answer(session, a, got.item.id, f"progress-{n:06d}", now=now)
    found = service.progress(session, loop=loop, user_id=a, now=T0 + timedelta(seconds=30))
    assert (found.labelled_today, found.left_for_you, found.labels_missing) == (3, 17, 17)
    # hand computation: two 10 s gaps time two labels, so 10 s per label and 17 left take 170 s
    assert found.seconds_per_label == pytest.approx(10.0)
    assert found.expected_seconds_left == pytest.approx(170.0)
    tomorrow = service.progress(session, loop=loop, user_id=a, now=T0 + timedelta(days=1))
    assert (tomorrow.labelled_today, tomorrow.seconds_per_label) == (0, None)


def test_round_queue_counts(make_loop, session, annotators):
    make_loop(DISCRETE_SPEC, settings={"labels_per_state": 2}, queue=4)
    a, b = annotators["a"], annotators["b"]
    loop = loop_of(session)
    first = claim(session, a)
    answer(session, a, first.item.id, "round-count-001", action=None)
    claim(session, b)
    second = claim(session, a)
    service.skip(session, loop=loop, item_id=second.item.id, user_id=a, now=T0)
    rnd = loops_service.get_round(session, loop=loop, number=1)
    counts = service.round_queue(session, rnd=rnd, now=T0)
    assert (counts.items, counts.open, counts.done, counts.labels_needed) == (4, 4, 0, 8)
    assert (counts.labels, counts.unsure, counts.span_labels) == (1, 1, 0)
    assert (counts.live_leases, counts.skips) == (1, 1)


def test_claims_use_the_backend_lock(discrete_loop, session, annotators, engine):
    statements: list[str] = []

    def record(conn, cursor, statement, parameters, context, executemany):
        statements.append(statement.upper())

    event.listen(engine, "before_cursor_execute", record)
    try:
        claim(session, annotators["a"])
    finally:
        event.remove(engine, "before_cursor_execute", record)
    if engine.dialect.name == "postgresql":
        assert any("FOR UPDATE OF QUEUE_ITEMS SKIP LOCKED" in s for s in statements)
    else:
        assert "BEGIN IMMEDIATE" in statements


def test_a_claim_asks_only_rounds_with_open_items(
    client, admin, uploader, app, make_loop, make_user
):
    # A loop's finished rounds (the seed round, every round labelled) cost a claim nothing: it
    # looks for a candidate once, in the round that still has open items.
    slug = make_loop()
    with app.state.session_factory() as session:
        session.execute(update(QueueItem).values(status=ITEM_DONE))  # round 1 fully labelled
        session.commit()
    assert (
        client.post(
            f"/api/loops/{slug}/rounds", json={"learner_version": "v2"}, headers=admin
        ).status_code
        == 201
    )
    cols = discrete_rows(1, 5)
    cols["rollout"] = [f"late-{r}" for r in cols["rollout"]]
    assert (
        client.post(
            f"/api/loops/{slug}/rounds/2/rollouts",
            files={"file": ("r.parquet", parquet_bytes(cols))},
            headers=uploader,
        ).status_code
        == 201
    )
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=slug)
        rnd = loops_service.get_round(session, loop=loop, number=2)
        steps = session.scalars(select(Step.id).where(Step.round_id == rnd.id)).all()
        enqueue_steps(session, rnd=rnd, loop=loop, step_ids=steps)
        session.commit()
        round_two = rnd.id
    searches: list[str] = []

    def seen(conn, cursor, statement, parameters, context, executemany):
        if "FROM queue_items" in statement and "ORDER BY queue_items.position" in statement:
            searches.append(statement)

    annotator = make_user("annotator", name="late")
    event.listen(app.state.engine, "before_cursor_execute", seen)
    try:
        got = client.post(f"/api/loops/{slug}/queue/claim", headers=annotator)
    finally:
        event.remove(app.state.engine, "before_cursor_execute", seen)
    assert got.status_code == 200, got.text
    with app.state.session_factory() as session:
        item = session.get(QueueItem, got.json()["item"]["item_id"])
        assert item is not None and item.round_id == round_two
    assert len(searches) == 1
