"""My recent labels: listed with their states, undone while no snapshot holds them, changed at
any time (a correction once a snapshot holds the old answer), through the API and the service,
and against another annotator working on the same items at the same moment."""

from __future__ import annotations

import json
import threading
import uuid
from concurrent.futures import ThreadPoolExecutor

import pytest
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from expertloop.errors import Conflict, NotFound
from expertloop.loops import service as loops_service
from expertloop.models import utcnow
from expertloop.queue import service as queue_service
from expertloop.queue.models import ANSWER_UNDONE, Label, QueueItem
from expertloop.revisions import service
from expertloop.shared.current import is_current
from tests.helpers import DISCRETE_SPEC
from tests.queue.conftest import user_id

SLUG = DISCRETE_SPEC["slug"]
QUEUE = f"/api/loops/{SLUG}/queue"


def sid() -> str:
    return uuid.uuid4().hex


def label_next(client, headers, action: int) -> dict:
    item = client.post(f"{QUEUE}/claim", headers=headers).json()["item"]
    assert item is not None
    sent = client.post(
        f"{QUEUE}/items/{item['item_id']}/labels",
        json={"submission_id": sid(), "answer": "action", "action": action},
        headers=headers,
    )
    assert sent.status_code == 201, sent.text
    return sent.json()


def export_actions(client, headers, version: str) -> dict[int, int]:
    got = client.get(
        f"/api/loops/{SLUG}/snapshots/{version}/export", params={"format": "jsonl"}, headers=headers
    )
    assert got.status_code == 200, got.text
    rows = [json.loads(line) for line in got.text.splitlines() if line.strip()]
    return {r["step_id"]: r["expert_action"] for r in rows}


@pytest.fixture
def ann(make_user):
    return make_user("annotator", name="ann")


def test_recent_labels_are_the_last_20_with_their_states(client, make_loop, ann):
    make_loop(DISCRETE_SPEC, queue=20)  # two rollouts of 10 steps: 20 items
    stored = [label_next(client, ann, k % 3) for k in range(20)]
    listed = client.get(f"{QUEUE}/my-labels", headers=ann).json()
    assert listed["total"] == 20
    assert [x["id"] for x in listed["items"]] == [s["id"] for s in reversed(stored)]
    newest = listed["items"][0]
    assert newest["state"]["id"] == stored[-1]["step_id"]
    assert newest["state"]["rollout"] and isinstance(newest["state"]["features"], list)
    assert newest["action_name"] == ["proceed", "creep", "hold"][19 % 3]
    assert newest["can_undo"] and newest["in_snapshot"] is None and newest["replaces"] is None
    # only 20 are listed although more exist
    make_loop({**DISCRETE_SPEC, "slug": "other-loop"}, queue=2)
    assert len(client.get(f"{QUEUE}/my-labels", headers=ann).json()["items"]) == 20


def test_undo_returns_the_state_to_the_queue(client, make_loop, ann, admin, app):
    make_loop(DISCRETE_SPEC, queue=3)
    first = label_next(client, ann, 1)
    label_next(client, ann, 2)
    request = sid()
    undone = client.post(
        f"{QUEUE}/my-labels/{first['id']}/undo", json={"submission_id": request}, headers=ann
    )
    assert undone.status_code == 200 and undone.json()["repeated"] is False
    again = client.post(
        f"{QUEUE}/my-labels/{first['id']}/undo", json={"submission_id": request}, headers=ann
    )
    assert again.status_code == 200 and again.json()["repeated"] is True  # a resend, stored once
    twice = client.post(
        f"{QUEUE}/my-labels/{first['id']}/undo", json={"submission_id": sid()}, headers=ann
    )
    assert twice.status_code == 409 and "already undone or changed" in twice.json()["detail"]
    ids = [x["id"] for x in client.get(f"{QUEUE}/my-labels", headers=ann).json()["items"]]
    assert first["id"] not in ids and len(ids) == 1
    counts = client.get(f"/api/loops/{SLUG}/rounds/1/queue", headers=admin).json()
    assert (counts["labels"], counts["undone"], counts["open"], counts["done"]) == (1, 1, 2, 1)
    # the state comes back first (its queue position), and may be answered again
    relabelled = label_next(client, ann, 0)
    assert relabelled["item_id"] == first["item_id"]
    progress = client.get(f"{QUEUE}/progress", headers=ann).json()
    assert progress["labelled_today"] == 2  # the undone answer no longer counts
    with app.state.session_factory() as session:
        marks = session.scalars(select(Label).where(Label.answer == ANSWER_UNDONE)).all()
    assert [m.supersedes_id for m in marks] == [first["id"]]


def test_change_before_and_correction_after_a_snapshot(client, make_loop, ann, admin):
    make_loop(DISCRETE_SPEC, queue=3)
    a = label_next(client, ann, 0)
    b = label_next(client, ann, 0)
    before = client.post(
        f"{QUEUE}/my-labels/{a['id']}/change",
        json={"submission_id": sid(), "answer": "action", "action": 1},
        headers=ann,
    )
    assert before.status_code == 201, before.text
    changed = before.json()
    assert changed["correction"] is False and changed["label"]["replaces"] == a["id"]
    v1 = client.post(f"/api/loops/{SLUG}/snapshots", json={}, headers=admin).json()
    assert v1["version"] == "v1"
    assert export_actions(client, admin, "v1") == {a["step_id"]: 1, b["step_id"]: 0}
    mine = {x["id"]: x for x in client.get(f"{QUEUE}/my-labels", headers=ann).json()["items"]}
    assert mine[b["id"]]["in_snapshot"] == "v1" and mine[b["id"]]["can_undo"] is False
    refused = client.post(
        f"{QUEUE}/my-labels/{b['id']}/undo", json={"submission_id": sid()}, headers=ann
    )
    assert refused.status_code == 409 and "v1" in refused.json()["detail"]
    corrected = client.post(
        f"{QUEUE}/my-labels/{b['id']}/change",
        json={"submission_id": sid(), "answer": "action", "action": 2},
        headers=ann,
    )
    assert corrected.status_code == 201 and corrected.json()["correction"] is True
    # the published version keeps the old answer; the next one uses the correction
    assert export_actions(client, admin, "v1") == {a["step_id"]: 1, b["step_id"]: 0}
    v2 = client.post(f"/api/loops/{SLUG}/snapshots", json={}, headers=admin).json()
    assert v2["version"] == "v2"
    assert export_actions(client, admin, "v2") == {a["step_id"]: 1, b["step_id"]: 2}
    counts = client.get(f"/api/loops/{SLUG}/rounds/1/queue", headers=admin).json()
    assert (counts["labels"], counts["corrections"], counts["undone"]) == (2, 2, 0)
    # a correction of a correction: the newest answer stands, once
    third = client.post(
        f"{QUEUE}/my-labels/{corrected.json()['label']['id']}/change",
        json={"submission_id": sid(), "answer": "unsure"},
        headers=ann,
    )
    assert third.status_code == 201
    v3 = client.post(f"/api/loops/{SLUG}/snapshots", json={}, headers=admin).json()
    assert export_actions(client, admin, v3["version"]) == {a["step_id"]: 1}  # unsure: no vote


def test_bad_requests_change_nothing(client, make_loop, ann, make_user, engine):
    from tests.conftest import store_contents

    make_loop(DISCRETE_SPEC, queue=3)
    mine = label_next(client, ann, 0)
    other = make_user("annotator", name="bea")
    before = store_contents(engine)
    url = f"{QUEUE}/my-labels/{mine['id']}"
    theirs = client.post(f"{url}/undo", json={"submission_id": sid()}, headers=other)
    assert theirs.status_code == 404  # another annotator's label is not theirs to see
    bad_action = client.post(
        f"{url}/change", json={"submission_id": sid(), "answer": "action", "action": 7}, headers=ann
    )
    assert bad_action.status_code == 422 and "out of range" in bad_action.json()["detail"]
    bad_id = client.post(f"{url}/undo", json={"submission_id": "x"}, headers=ann)
    assert bad_id.status_code == 422 and "submission_id" in bad_id.json()["detail"]
    reused = client.post(f"{url}/undo", json={"submission_id": "s" * 10}, headers=ann)
    assert reused.status_code == 200
    again = client.post(
        f"{QUEUE}/my-labels/999999/undo", json={"submission_id": sid()}, headers=ann
    )
    assert again.status_code == 404
    after = store_contents(engine)
    assert len(after["labels"]) == len(before["labels"]) + 1  # only the one undo


def _loop_and_items(app):
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=SLUG)
        items = list(session.scalars(select(QueueItem.id).order_by(QueueItem.position)))
    return loop, items


def test_undo_races_another_annotators_submit(app, make_loop, make_user):
    """A undoes their label on an item while B submits on the same item, 12 items in a row; the
    item's count always equals its standing answers, and each request either wins or is
    refused with a Conflict."""
    make_loop(DISCRETE_SPEC, settings={"labels_per_state": 2}, queue=12)
    make_user("annotator", name="ann")
    make_user("annotator", name="bea")
    a, b = user_id(app, "ann"), user_id(app, "bea")
    loop, items = _loop_and_items(app)
    factory = app.state.session_factory
    outcomes = []
    for _ in items:
        with factory() as session:
            held_a = queue_service.claim_next(session, loop=loop, user_id=a, now=utcnow())
            held_b = queue_service.claim_next(session, loop=loop, user_id=b, now=utcnow())
        assert held_a and held_b and held_a.item.id == held_b.item.id
        item_id = held_a.item.id
        with factory() as session:
            stored = queue_service.submit(
                session, loop=loop, item_id=item_id, user_id=a, submission_id=sid(),
                answer="action", action=0, now=utcnow(),
            ).label.id  # fmt: skip
        start = threading.Barrier(2)

        def undo_a(label_id=stored, start=start):
            start.wait()
            with factory() as session:
                service.undo(
                    session, loop=loop, label_id=label_id, user_id=a, submission_id=sid(),
                    now=utcnow(),
                )  # fmt: skip
            return "undone"

        def submit_b(item_id=item_id, start=start):
            start.wait()
            with factory() as session:
                queue_service.submit(
                    session, loop=loop, item_id=item_id, user_id=b, submission_id=sid(),
                    answer="action", action=2, now=utcnow(),
                )  # fmt: skip
            return "submitted"

        with ThreadPoolExecutor(2) as pool:
            results = [pool.submit(undo_a), pool.submit(submit_b)]
            outcomes.append(tuple(r.result() for r in results))
        with factory() as session:
            item = session.get(QueueItem, item_id)
            assert item.labels_done == standing_count(session, item_id=item_id) == 1
            assert item.status == "open"  # one of two answers stands
            # A may answer the state again; then it is done with two different annotators
            again = queue_service.claim_next(session, loop=loop, user_id=a, now=utcnow())
            assert again is not None and again.item.id == item_id
            queue_service.submit(
                session, loop=loop, item_id=item_id, user_id=a, submission_id=sid(),
                answer="action", action=1, now=utcnow(),
            )  # fmt: skip
            session.expire_all()
            item = session.get(QueueItem, item_id)
            assert (item.labels_done, item.status) == (2, "done")
    assert outcomes == [("undone", "submitted")] * len(items)


def test_two_revisions_of_one_label_at_once(app, make_loop, make_user):
    """A double click sent as two requests with different ids: exactly one revision stands."""
    make_loop(DISCRETE_SPEC, queue=6)
    make_user("annotator", name="ann")
    a = user_id(app, "ann")
    loop, _ = _loop_and_items(app)
    factory = app.state.session_factory
    for round_trip in range(6):
        with factory() as session:
            held = queue_service.claim_next(session, loop=loop, user_id=a, now=utcnow())
            label_id = queue_service.submit(
                session, loop=loop, item_id=held.item.id, user_id=a, submission_id=sid(),
                answer="action", action=0, now=utcnow(),
            ).label.id  # fmt: skip
        start = threading.Barrier(2)

        def revise(kind: str, label_id=label_id, start=start):
            start.wait()
            with factory() as session:
                try:
                    if kind == "undo":
                        service.undo(
                            session, loop=loop, label_id=label_id, user_id=a,
                            submission_id=sid(), now=utcnow(),
                        )  # fmt: skip
                    else:
                        service.change(
                            session, loop=loop, label_id=label_id, user_id=a,
                            submission_id=sid(), answer="action", action=2, now=utcnow(),
                        )  # fmt: skip
                except Conflict:
                    return "refused"
            return kind

        kinds = ("undo", "change") if round_trip % 2 else ("change", "change")
        with ThreadPoolExecutor(2) as pool:
            got = sorted(f.result() for f in [pool.submit(revise, k) for k in kinds])
        assert got.count("refused") == 1, got
        with factory() as session:
            successors = session.scalars(
                select(Label.id).where(Label.supersedes_id == label_id)
            ).all()
            assert len(successors) == 1


def test_service_refuses_what_is_not_yours(app, make_loop, make_user):
    make_loop(DISCRETE_SPEC, queue=2)
    make_user("annotator", name="ann")
    make_user("annotator", name="bea")
    a, b = user_id(app, "ann"), user_id(app, "bea")
    loop, _ = _loop_and_items(app)
    with app.state.session_factory() as session:
        held = queue_service.claim_next(session, loop=loop, user_id=a, now=utcnow())
        label = queue_service.submit(
            session, loop=loop, item_id=held.item.id, user_id=a, submission_id=sid(),
            answer="action", action=0, now=utcnow(),
        ).label  # fmt: skip
        with pytest.raises(NotFound):
            service.change(
                session, loop=loop, label_id=label.id, user_id=b, submission_id=sid(),
                answer="unsure", action=None, now=utcnow(),
            )  # fmt: skip
        assert [lab.id for lab in service.recent(session, loop=loop, user_id=a)] == [label.id]
        assert service.recent(session, loop=loop, user_id=b) == []


def standing_count(session: Session, *, item_id: int) -> int:
    """Standing answers on an item (it must equal the item's labels_done)."""
    return int(
        session.scalar(
            select(func.count())
            .select_from(Label)
            .where(Label.item_id == item_id, Label.span.is_(False), is_current())
        )
        or 0
    )
