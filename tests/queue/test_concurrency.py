"""32 annotators at once against a real server on loopback (whichever store the suite runs on):
every item ends with exactly k labels from k different annotators, no item is handed to more
holders than it has free label slots, and no submitted label is lost."""

from __future__ import annotations

import random
import threading
from collections import Counter, defaultdict
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import httpx
import pytest
from sqlalchemy import select

from expertloop.auth.models import User
from expertloop.queue.models import ITEM_DONE, Label, Lease, QueueItem, Skip
from tests.helpers import DISCRETE_SPEC, discrete_rows
from tests.serving import server_process

N_CLIENTS = 32
K = 2
N_ITEMS = 60


@dataclass
class Record:
    """What one annotator client saw."""

    user: str
    claims: list[int] = field(default_factory=list)
    labels: list[tuple[int, int]] = field(default_factory=list)  # (item id, label id)
    skips: list[int] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)


def annotate(base: str, headers: dict[str, str], record: Record, start: threading.Barrier) -> None:
    """Claim and answer until nothing is left for this annotator; skip about one item in ten,
    and send about one answer in five twice at the same moment."""
    rng = random.Random(record.user)
    queue = "/api/loops/aisle-crossing/queue"
    with (
        httpx.Client(base_url=base, headers=headers, timeout=60) as http,
        ThreadPoolExecutor(2) as pair,
    ):
        start.wait()
        n = 0
        while True:
            got = http.post(f"{queue}/claim")
            if got.status_code != 200:
                record.problems.append(f"claim {got.status_code} {got.text}")
                return
            item = got.json()["item"]
            if item is None:
                # items held by others may come back (a holder can skip): stop only when none
                # is left that this annotator could still answer
                if http.get(f"{queue}/progress").json()["left_for_you"] == 0:
                    return
                threading.Event().wait(0.02)
                continue
            item_id = item["item_id"]
            record.claims.append(item_id)
            if rng.random() < 0.1:
                skipped = http.post(f"{queue}/items/{item_id}/skip")
                if skipped.status_code != 200:
                    record.problems.append(f"skip {skipped.status_code} {skipped.text}")
                record.skips.append(item_id)
                continue
            n += 1
            body = {
                "submission_id": f"{record.user}-{n:05d}",
                "answer": "action",
                "action": rng.randrange(3),
            }
            url = f"{queue}/items/{item_id}/labels"
            if rng.random() < 0.2:
                twice = [pair.submit(http.post, url, json=body) for _ in range(2)]
                sent = [future.result() for future in twice]
                statuses = sorted(r.status_code for r in sent)
                if statuses != [200, 201] or len({r.json().get("id") for r in sent}) != 1:
                    record.problems.append(f"double submit {statuses} {[r.text for r in sent]}")
                    continue
                stored = sent[0]
            else:
                stored = http.post(url, json=body)
                if stored.status_code != 201:
                    record.problems.append(f"submit {stored.status_code} {stored.text}")
                    continue
            record.labels.append((item_id, stored.json()["id"]))


@pytest.mark.slow  # about 10 s: two server processes start, then 32 clients run
def test_32_annotators_at_once(make_loop, make_user, settings, app):
    make_loop(
        DISCRETE_SPEC,
        settings={"labels_per_state": K},
        columns=discrete_rows(3, 25),
        queue=N_ITEMS,
    )
    users = [f"ann{i:02d}" for i in range(N_CLIENTS)]
    headers = {name: make_user("annotator", name=name) for name in users}
    records = [Record(user=name) for name in users]
    start = threading.Barrier(N_CLIENTS)
    # two server processes: claims also compete across processes (row locks, BEGIN IMMEDIATE)
    with server_process(
        settings.resolved_database_url,
        settings.data_dir,
        workers=2,
        log_path=settings.data_dir.parent / "server.log",
    ) as server:
        base = server.url
        threads = [
            threading.Thread(target=annotate, args=(base, headers[r.user], r, start))
            for r in records
        ]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join(timeout=120)
        assert not any(thread.is_alive() for thread in threads)

    assert [p for r in records for p in r.problems] == []
    with app.state.session_factory() as session:
        names = dict(session.execute(select(User.id, User.name)).all())
        items = session.scalars(select(QueueItem)).all()
        labels = session.scalars(select(Label)).all()
        skips = session.execute(select(Skip.item_id, Skip.user_id)).all()
        leases = session.scalars(select(Lease)).all()

    # every item: exactly K labels, from K different annotators
    assert len(items) == N_ITEMS
    by_item: dict[int, list[str]] = defaultdict(list)
    for label in labels:
        by_item[label.item_id].append(names[label.user_id])
    for item in items:
        assert (item.status, item.labels_done) == (ITEM_DONE, K)
        assert len(by_item[item.id]) == K and len(set(by_item[item.id])) == K
    assert leases == []  # finished items hold no leases

    # no submitted label lost, none stored that a client did not get back
    sent = {(item_id, label_id, r.user) for r in records for item_id, label_id in r.labels}
    stored = {(label.item_id, label.id, names[label.user_id]) for label in labels}
    assert sent == stored

    # nobody was handed the same item twice; each item went to its K labellers and its skippers
    # only, so no lease was held beyond the item's free slots
    claims = Counter((item_id, r.user) for r in records for item_id in r.claims)
    assert max(claims.values()) == 1
    skipped = {(item_id, names[user]) for item_id, user in skips}
    assert skipped == {(item_id, r.user) for r in records for item_id in r.skips}
    for item in items:
        holders = {user for (item_id, user) in claims if item_id == item.id}
        assert holders == set(by_item[item.id]) | {u for i, u in skipped if i == item.id}
        assert not set(by_item[item.id]) & {u for i, u in skipped if i == item.id}
