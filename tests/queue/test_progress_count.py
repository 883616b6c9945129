""" "Left for you" on the bench's progress line, counted from the annotator's own labels and
skips, against the item-by-item count it replaced (open items of the loop for which
`rules.answered_by` does not hold): the same numbers after labels from two annotators, span
labels, a skip, an undo and a change, with two labels needed per state so labelled items stay
open."""

from __future__ import annotations

import uuid

from sqlalchemy import func, select

from expertloop.loops import service as loops_service
from expertloop.models import utcnow
from expertloop.queue import progress
from expertloop.queue.models import ITEM_OPEN, QueueItem
from expertloop.queue.rules import answered_by, rounds_of
from tests.helpers import DISCRETE_SPEC
from tests.queue.conftest import user_id

SLUG = DISCRETE_SPEC["slug"]
QUEUE = f"/api/loops/{SLUG}/queue"


def item_by_item(session, loop, who: int) -> int:
    """The count before: every open item of the loop, checked one by one."""
    return session.scalar(
        select(func.count())
        .select_from(QueueItem)
        .where(
            QueueItem.round_id.in_(rounds_of(loop.id)),
            QueueItem.status == ITEM_OPEN,
            ~answered_by(),
        ),
        {"user_id": who},
    )


def label(client, headers, action: int, **extra) -> dict:
    item = client.post(f"{QUEUE}/claim", headers=headers).json()["item"]
    assert item is not None
    body = {"submission_id": uuid.uuid4().hex, "answer": "action", "action": action, **extra}
    sent = client.post(f"{QUEUE}/items/{item['item_id']}/labels", json=body, headers=headers)
    assert sent.status_code == 201, sent.text
    return sent.json()


def test_left_for_you_matches_the_item_by_item_count(client, make_loop, make_user, app):
    make_loop(DISCRETE_SPEC, settings={"labels_per_state": 2, "span_labels": True})
    a, b = make_user("annotator", name="a"), make_user("annotator", name="b")
    ids = {"a": user_id(app, "a"), "b": user_id(app, "b")}

    def check(expected_a: int) -> None:
        with app.state.session_factory() as session:
            loop = loops_service.get_loop(session, slug=SLUG)
            for name, who in ids.items():
                found = progress.progress(session, loop=loop, user_id=who, now=utcnow())
                assert found.left_for_you == item_by_item(session, loop, who), name
            left_a = progress.progress(session, loop=loop, user_id=ids["a"], now=utcnow())
            assert left_a.left_for_you == expected_a

    check(20)  # 20 states queued, none answered
    first = label(client, a, 1)
    label(client, a, 2)
    label(client, a, 0, span_steps=1)  # its span copy is no answer on the item before it
    check(17)
    item = client.post(f"{QUEUE}/claim", headers=a).json()["item"]
    assert client.post(f"{QUEUE}/items/{item['item_id']}/skip", headers=a).status_code == 200
    check(16)
    undone = client.post(
        f"{QUEUE}/my-labels/{first['id']}/undo",
        json={"submission_id": uuid.uuid4().hex},
        headers=a,
    )
    assert undone.status_code == 200, undone.text
    check(17)  # the undone state is left for a again
    for _ in range(3):
        label(client, b, 1)
    # b took the first three states: the one a undid (still open, left for a) and the two a
    # labelled, now done with two labels each, so they leave the open queue and a's answers
    check(17)
    second = client.get(f"{QUEUE}/my-labels", headers=a).json()["items"][0]
    changed = client.post(
        f"{QUEUE}/my-labels/{second['id']}/change",
        json={"submission_id": uuid.uuid4().hex, "answer": "action", "action": 0},
        headers=a,
    )
    assert changed.status_code == 201, changed.text
    check(17)  # a's newest label, changed, is on a done state: nothing moves
