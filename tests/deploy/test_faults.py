"""Faults of a team deployment, provoked for real against a private PostgreSQL cluster.

Each test starts its own cluster (tests/deploy/pgcluster.py) and runs `expertloop serve` and
`expertloop worker` as processes, so a stopped database or a killed process disturbs nobody.
They do not use EXPERTLOOP_TEST_DATABASE_URL and run, unchanged, in both passes of the suite.
"""

from __future__ import annotations

import random
import threading
import time
import uuid
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest
from sqlalchemy import select

from expertloop.auth import service as auth_service
from expertloop.db import make_engine, make_session_factory
from expertloop.ingest.models import Step
from expertloop.loops import service as loops_service
from expertloop.migrations_state import upgrade
from tests.deploy.pgcluster import PgCluster, free_port
from tests.deploy.services import (
    Service,
    add_user,
    chunked,
    discrete_round_parquet,
    process_env,
    serve_command,
    stop_all,
    wait_for_http,
    wait_for_job,
    wait_until,
)
from tests.helpers import DISCRETE_SPEC
from tests.serving import enqueue_steps

SLUG = DISCRETE_SPEC["slug"]
# Short enough that a job of a killed worker is taken over within the test's time, long enough
# that heartbeats (every third of it) keep a live worker's job through the longest ranking phase.
LEASE_SECONDS = 8


def _deployment(pg_cluster: PgCluster, tmp_path: Path, **settings: Any) -> dict[str, str]:
    url = pg_cluster.create_database("expertloop")
    upgrade(url)
    return process_env({}, database_url=url, data_dir=tmp_path / "data", **settings)


def _loop_with_rounds(client: httpx.Client, admin: dict[str, str]) -> None:
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    opened = client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin)
    assert opened.status_code == 201, opened.text


def _upload(client: httpx.Client, headers: dict[str, str], number: int, data: bytes) -> Any:
    response = client.post(
        f"/api/loops/{SLUG}/rounds/{number}/rollouts",
        files={"file": (f"round-{number}.parquet", data)},
        headers=headers,
    )
    assert response.status_code == 201, response.text
    return response.json()


def _store_counts(pg_cluster: PgCluster) -> dict[str, int]:
    counts = {}
    for table in ("uploads", "rollouts", "steps"):
        rows = pg_cluster.execute(f"SELECT count(*) FROM {table}", "expertloop")
        counts[table] = int(str(rows[0][0]))
    return counts


def _job_worker(pg_cluster: PgCluster, job_id: int) -> str:
    rows = pg_cluster.execute(f"SELECT worker FROM jobs WHERE id = {job_id}", "expertloop")
    return str(rows[0][0])


def _selection(client: httpx.Client, headers: dict[str, str]) -> list[tuple[Any, ...]]:
    body = client.get(f"/api/loops/{SLUG}/rounds/1/selection?limit=1000", headers=headers).json()
    assert body["total"] == len(body["items"])
    keys = ("step_id", "reason", "rank", "uncertainty", "novelty", "boost", "score")
    return [tuple(item[k] for k in keys) for item in body["items"]]


# --- a. PostgreSQL stopped and started while annotators label -------------------------------

ANNOTATORS = 8
ITEMS = 150
LABELS_PER_STATE = 2
UNREACHABLE = "the database is unreachable right now; nothing was changed, try again shortly"


@dataclass
class Annotator:
    """One labelling client: what it was told, so the store can be checked against it."""

    name: str
    headers: dict[str, str]
    # submission id -> (item id, label id, when it was confirmed)
    confirmed: dict[str, tuple[int, int, float]] = field(default_factory=dict)
    resent: int = 0  # submissions whose first answer was a 503, sent again with the same id
    statuses: Counter[int] = field(default_factory=Counter)
    refusals: list[tuple[int, str, str | None]] = field(default_factory=list)  # 503 detail, header
    unexpected: list[str] = field(default_factory=list)


def _label_until_empty(base: str, who: Annotator, deadline: float) -> None:
    rng = random.Random(who.name)
    with httpx.Client(base_url=base, headers=who.headers, timeout=30) as client:

        def post(path: str, **kwargs: Any) -> httpx.Response | None:
            try:
                response = client.post(path, **kwargs)
            except httpx.TransportError as exc:  # the servers stay up: this must not happen
                who.unexpected.append(f"{path}: {exc!r}")
                return None
            who.statuses[response.status_code] += 1
            if response.status_code == 503:
                detail = response.json().get("detail")
                who.refusals.append((503, detail, response.headers.get("retry-after")))
                time.sleep(0.2)
            return response

        while time.monotonic() < deadline and not who.unexpected:
            claimed = post(f"/api/loops/{SLUG}/queue/claim")
            if claimed is None or claimed.status_code == 503:
                continue
            if claimed.status_code != 200:
                who.unexpected.append(f"claim: {claimed.status_code} {claimed.text}")
                break
            item = claimed.json()["item"]
            if item is None:
                return  # nothing left for this annotator
            submission = {
                "submission_id": f"{who.name}-{uuid.uuid4().hex[:20]}",
                "answer": "action",
                "action": rng.randrange(3),
            }
            url = f"/api/loops/{SLUG}/queue/items/{item['item_id']}/labels"
            first = True
            # Resend the same submission until its outcome is known: the API is idempotent on
            # the submission id, so a label that was stored before a 503 is not stored twice.
            while time.monotonic() < deadline:
                sent = post(url, json=submission)
                if sent is None:
                    break
                if sent.status_code in (200, 201):
                    if not first:
                        who.resent += 1
                    if sent.json()["repeated"] != (sent.status_code == 200):
                        who.unexpected.append(f"submit: {sent.status_code} {sent.text}")
                    who.confirmed[submission["submission_id"]] = (
                        item["item_id"],
                        sent.json()["id"],
                        time.monotonic(),
                    )
                    break
                if sent.status_code != 503:
                    who.unexpected.append(f"submit: {sent.status_code} {sent.text}")
                    break
                first = False
        if time.monotonic() >= deadline:
            who.unexpected.append("ran out of time")


@pytest.mark.slow
def test_database_restart_under_labelling_loses_and_duplicates_no_label(
    pg_cluster: PgCluster, tmp_path: Path, log_dir: Path
) -> None:
    env = _deployment(pg_cluster, tmp_path, job_mode="off")
    url = env["EXPERTLOOP_DATABASE_URL"]
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:
        admin_user = auth_service.create_user(session, name="root", roles=["admin"])
        admin = {"Authorization": f"Bearer {auth_service.issue_token(session, user=admin_user)}"}
        annotators = []
        for i in range(ANNOTATORS):
            user = auth_service.create_user(session, name=f"expert-{i}", roles=["annotator"])
            token = auth_service.issue_token(session, user=user)
            annotators.append(Annotator(f"expert-{i}", {"Authorization": f"Bearer {token}"}))
    # two server processes, as a team deployment runs several
    server = Service("app", serve_command(port, workers=2), env, log_dir).start()
    try:
        wait_for_http(base, server)
        client = httpx.Client(base_url=base, timeout=30)
        spec = DISCRETE_SPEC | {"settings": {"labels_per_state": LABELS_PER_STATE}}
        assert client.post("/api/loops", json=spec, headers=admin).status_code == 201
        opened = client.post(
            f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin
        )
        assert opened.status_code == 201
        _upload(client, admin, 1, discrete_round_parquet(15, 20, seed=4, expert=False))
        with make_session_factory(engine)() as session:
            loop = loops_service.get_loop(session, slug=SLUG)
            rnd = loops_service.get_round(session, loop=loop, number=1)
            steps = session.scalars(select(Step.id).order_by(Step.id).limit(ITEMS)).all()
            assert enqueue_steps(session, rnd=rnd, loop=loop, step_ids=steps) == ITEMS
            session.commit()
        engine.dispose()

        deadline = time.monotonic() + 90
        threads = [
            threading.Thread(target=_label_until_empty, args=(base, who, deadline))
            for who in annotators
        ]
        for thread in threads:
            thread.start()
        total = ITEMS * LABELS_PER_STATE
        wait_until(
            lambda: sum(len(a.confirmed) for a in annotators) >= total // 6,
            timeout=60,
            interval=0.02,
            what="labelling to get going",
        )
        pg_cluster.stop("immediate")  # as abrupt as a crash: no checkpoint, clients cut off
        time.sleep(2.0)
        during = httpx.get(f"{base}/readyz", timeout=10)
        labelled_before_restart = sum(len(a.confirmed) for a in annotators)
        pg_cluster.start()
        restarted = time.monotonic()
        for thread in threads:
            thread.join(timeout=max(1.0, deadline - time.monotonic()))
        assert not any(thread.is_alive() for thread in threads)

        assert during.status_code == 503 and during.json()["status"] == "unavailable"
        assert [a.unexpected for a in annotators] == [[]] * ANNOTATORS
        refusals = [r for a in annotators for r in a.refusals]
        assert refusals, "no request met the outage"
        assert set(refusals) == {(503, UNREACHABLE, "2")}
        statuses = sum((a.statuses for a in annotators), Counter())
        assert set(statuses) <= {200, 201, 503}, statuses
        # the same server processes serve again: recovered without a restart
        assert server.alive()
        assert httpx.get(f"{base}/readyz", timeout=10).status_code == 200
        after = [t for a in annotators for (_, _, t) in a.confirmed.values() if t > restarted]
        assert labelled_before_restart < total and len(after) > 0

        confirmed = {sid: c for a in annotators for sid, c in a.confirmed.items()}
        assert len(confirmed) == total  # every item got its labels, each confirmed once
        stored = pg_cluster.execute(
            "SELECT submission_id, item_id, id, user_id FROM labels", "expertloop"
        )
        assert {row[0]: (row[1], row[2]) for row in stored} == {
            sid: (item, label) for sid, (item, label, _) in confirmed.items()
        }
        assert len(stored) == total and len({(r[1], r[3]) for r in stored}) == total
        items = pg_cluster.execute(
            "SELECT q.status, q.labels_done, count(l.id) FROM queue_items q "
            "LEFT JOIN labels l ON l.item_id = q.id GROUP BY q.id, q.status, q.labels_done",
            "expertloop",
        )
        assert len(items) == ITEMS
        assert set(items) == {("done", LABELS_PER_STATE, LABELS_PER_STATE)}
        server.stop()
        # every failure met during the outage became a 503: none escaped as a server error
        assert "Traceback" not in server.output(), server.output()[-3000:]
    finally:
        server.stop()


# --- b. a worker killed in the middle of a ranking job ---------------------------------------


@pytest.mark.slow
def test_job_of_killed_worker_is_finished_by_another_with_same_selection(
    pg_cluster: PgCluster, tmp_path: Path, log_dir: Path
) -> None:
    env = _deployment(pg_cluster, tmp_path, job_mode="worker", job_lease_seconds=LEASE_SECONDS)
    admin = add_user(env, "root", "admin")
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    server = Service("app", serve_command(port), env, log_dir)
    first = Service("worker-1", ["expertloop", "worker"], env, log_dir)
    second = Service("worker-2", ["expertloop", "worker"], env, log_dir)
    started = [server.start(), first.start()]
    try:
        wait_for_http(base, server)
        client = httpx.Client(base_url=base, timeout=60)
        _loop_with_rounds(client, admin)
        # 50,000 candidates against 1,000 training states: a ranking of a few seconds, with
        # the data loaded (progress 0.25) well before the scores are done (0.77)
        _upload(client, admin, 0, discrete_round_parquet(10, 100, seed=1, expert=True, prefix="d"))
        _upload(client, admin, 1, discrete_round_parquet(500, 100, seed=2, expert=False))
        request = {"budget": 300, "seed": 11}
        job = client.post(f"/api/loops/{SLUG}/rounds/1/ranking", json=request, headers=admin)
        assert job.status_code == 202, job.text
        job_id = job.json()["job"]["id"]

        def ranking_underway() -> dict[str, Any] | None:
            found: dict[str, Any] = client.get(f"/api/jobs/{job_id}", headers=admin).json()
            assert found["status"] in ("queued", "running"), found
            return found if 0.25 <= found["progress"] < 0.92 else None

        seen = wait_until(ranking_underway, timeout=30, interval=0.05, what="ranking to start")
        assert seen["status"] == "running" and 0 < seen["progress"] < 1
        assert f":{first.pid}:" in _job_worker(pg_cluster, job_id)
        first.kill()
        started.append(second.start())

        done = wait_for_job(client, job_id, admin, timeout=60)
        assert done["status"] == "done", done
        assert done["attempts"] == 2  # claimed by the killed worker, then by the second one
        assert f":{second.pid}:" in _job_worker(pg_cluster, job_id)
        taken_over = _selection(client, admin)
        assert len(taken_over) == 300
        queued = pg_cluster.execute(
            "SELECT count(*), count(DISTINCT step_id) FROM queue_items", "expertloop"
        )
        assert queued == [(300, 300)]  # one queue, not one per attempt

        # The same seed on the same round, uninterrupted: the selection must be identical.
        again = client.post(f"/api/loops/{SLUG}/rounds/1/ranking", json=request, headers=admin)
        assert again.status_code == 202, again.text
        reference = wait_for_job(client, again.json()["job"]["id"], admin, timeout=60)
        assert reference["status"] == "done" and reference["attempts"] == 1
        assert reference["result"] | {"selection_id": None} == done["result"] | {
            "selection_id": None
        }
        assert _selection(client, admin) == taken_over
    finally:
        stop_all(started)


# --- c. the server killed in the middle of an upload -----------------------------------------

BOUNDARY = "expertloop-fault-test"
INGEST_STATEMENT = (
    "SELECT count(*) FROM pg_stat_activity WHERE datname = 'expertloop' "
    "AND state <> 'idle' AND (query ILIKE 'INSERT INTO uploads%' "
    "OR query ILIKE 'INSERT INTO rollouts%' OR query ILIKE 'COPY steps%')"
)


def _multipart(data: bytes) -> tuple[bytes, dict[str, str]]:
    head = (
        f'--{BOUNDARY}\r\nContent-Disposition: form-data; name="file"; '
        'filename="round-1.parquet"\r\nContent-Type: application/octet-stream\r\n\r\n'
    ).encode()
    body = head + data + f"\r\n--{BOUNDARY}--\r\n".encode()
    headers = {
        "Content-Type": f"multipart/form-data; boundary={BOUNDARY}",
        "Content-Length": str(len(body)),
    }
    return body, headers


@pytest.mark.slow
def test_server_killed_mid_upload_stores_nothing_and_the_upload_succeeds_after(
    pg_cluster: PgCluster, tmp_path: Path, log_dir: Path
) -> None:
    env = _deployment(pg_cluster, tmp_path, job_mode="off")
    admin = add_user(env, "root", "admin")
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    url = f"/api/loops/{SLUG}/rounds/1/rollouts"
    data = discrete_round_parquet(500, 100, seed=3, expert=False)  # 50,000 steps
    body, multipart_headers = _multipart(data)
    headers = admin | multipart_headers
    servers: list[Service] = []

    def start_server(name: str) -> Service:
        server = Service(name, serve_command(port), env, log_dir).start()
        servers.append(server)
        wait_for_http(base, server)
        return server

    try:
        server = start_server("app-1")
        client = httpx.Client(base_url=base, timeout=60)
        _loop_with_rounds(client, admin)

        # 1. Killed while the body is still arriving.
        def killing_stream() -> Any:
            for i, chunk in enumerate(chunked(body, 256 * 1024)):
                if i == len(body) // (2 * 256 * 1024):
                    server.kill()
                yield chunk

        with pytest.raises(httpx.TransportError):
            client.post(url, content=killing_stream(), headers=headers)
        assert not server.alive()
        assert _store_counts(pg_cluster) == {"uploads": 0, "rollouts": 0, "steps": 0}

        # 2. Killed inside the ingest transaction (rows written, not yet committed).
        server = start_server("app-2")
        outcome: list[Any] = []

        def send() -> None:
            try:
                outcome.append(httpx.post(base + url, content=body, headers=headers, timeout=60))
            except httpx.TransportError as exc:
                outcome.append(exc)

        sender = threading.Thread(target=send)
        sender.start()
        wait_until(
            lambda: pg_cluster.execute(INGEST_STATEMENT, "expertloop")[0][0],
            timeout=60,
            interval=0.01,
            what="the ingest transaction to write",
        )
        server.kill()
        sender.join(timeout=30)
        assert len(outcome) == 1 and isinstance(outcome[0], httpx.TransportError), outcome
        # the dead connection's transaction is rolled back: nothing of the file is visible
        wait_until(
            lambda: not pg_cluster.execute(INGEST_STATEMENT, "expertloop")[0][0],
            timeout=10,
            what="the killed server's transaction to end",
        )
        assert _store_counts(pg_cluster) == {"uploads": 0, "rollouts": 0, "steps": 0}

        # 3. After a restart the same upload succeeds, whole, and a repeat stores nothing new.
        start_server("app-3")
        stored = client.post(url, content=body, headers=headers)
        assert stored.status_code == 201, stored.text
        assert stored.json()["steps"] == 50_000 and not stored.json()["duplicate_file"]
        assert len(stored.json()["rollouts"]) == 500
        repeat = client.post(url, content=body, headers=headers)
        assert repeat.status_code == 201 and repeat.json()["duplicate_file"], repeat.text
        assert _store_counts(pg_cluster) == {"uploads": 1, "rollouts": 500, "steps": 50_000}
    finally:
        stop_all(servers)
