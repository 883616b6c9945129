"""The annotators' queue routes run their store work within the queue's own turns of the thread
pool: however many annotators click at once, a server process runs at most `queue_threads` of
their requests' store work together (2 on SQLite, 4 on PostgreSQL by default), so their write
transactions are not stretched by dozens of threads trading the interpreter lock."""

from __future__ import annotations

import asyncio
import threading
import time
from typing import Any

import httpx
from sqlalchemy import event

from expertloop.queue import router as queue_router


def _count_overlap(monkeypatch: Any) -> dict[str, int]:
    """Wrap the claim's store work so that each takes 50 ms and the most at once is counted."""
    seen = {"now": 0, "most": 0}
    lock = threading.Lock()
    claim = queue_router._claim

    def counted(*args: Any, **kwargs: Any) -> Any:
        with lock:
            seen["now"] += 1
            seen["most"] = max(seen["most"], seen["now"])
        try:
            time.sleep(0.05)
            return claim(*args, **kwargs)
        finally:
            with lock:
                seen["now"] -= 1

    monkeypatch.setattr(queue_router, "_claim", counted)
    return seen


async def _claims(app: Any, headers_list: list[dict[str, str]], slug: str) -> list[int]:
    transport = httpx.ASGITransport(app=app)
    async with httpx.AsyncClient(transport=transport, base_url="http://test") as http:
        answers = await asyncio.gather(
            *(http.post(f"/api/loops/{slug}/queue/claim", headers=h) for h in headers_list)
        )
    return [a.status_code for a in answers]


def test_claims_of_many_annotators_take_the_queue_turns(app, make_user, discrete_loop, monkeypatch):
    turns = 2 if app.state.engine.dialect.name == "sqlite" else 4
    annotators = [make_user("annotator", name=f"a{i}") for i in range(10)]
    seen = _count_overlap(monkeypatch)
    statuses = asyncio.run(_claims(app, annotators, discrete_loop))
    assert statuses == [200] * 10
    # the default pool would run all ten at once (it has 40 threads)
    assert seen["most"] == turns


def test_the_turns_follow_the_setting(settings, make_user, discrete_loop, monkeypatch):
    from expertloop.main import create_app

    three = create_app(settings.model_copy(update={"queue_threads": 3}))
    annotators = [make_user("annotator", name=f"a{i}") for i in range(10)]
    seen = _count_overlap(monkeypatch)
    assert asyncio.run(_claims(three, annotators, discrete_loop)) == [200] * 10
    assert seen["most"] == 3


def test_a_known_loop_is_looked_up_once_a_request(client, app, make_user, discrete_loop):
    # Routes with an item id or a body settle in a dependency that the loop exists (so that an
    # unknown loop is a 404 whatever the request holds); the process remembers the loops it
    # found, and a known loop costs such a request only the route's own lookup.
    annotator = make_user("annotator", name="known")
    lookups: list[str] = []

    def seen(conn, cursor, statement, parameters, context, executemany):
        if "FROM loops" in statement:
            lookups.append(statement)

    queue = f"/api/loops/{discrete_loop}/queue"
    event.listen(app.state.engine, "before_cursor_execute", seen)
    try:
        per_request = []
        for n in range(3):
            item = client.post(f"{queue}/claim", headers=annotator).json()["item"]
            lookups.clear()
            body = {"submission_id": f"known-loop-{n:04d}", "answer": "action", "action": 1}
            sent = client.post(
                f"{queue}/items/{item['item_id']}/labels", json=body, headers=annotator
            )
            assert sent.status_code == 201, sent.text
            per_request.append(len(lookups))
    finally:
        event.remove(app.state.engine, "before_cursor_execute", seen)
    # the first submit settles that the loop exists; later ones ask only in the route's trip
    assert per_request == [2, 1, 1]
