"""Queue benchmark: annotator clients doing claim + submit against a live server on loopback.

    python bench/queue_claims.py                      # SQLite in a temporary folder, 1 server worker
    python bench/queue_claims.py --workers 2          # SQLite, 2 server processes on one file
    python bench/queue_claims.py --postgres postgresql+psycopg://postgres@127.0.0.1:5432/DBNAME
                                               # PostgreSQL, 2 workers; DBNAME IS EMPTIED

Two phases with the same 32 clients. "paced": each annotator looks at a state for a while
(uniform 0.5 to 1.5 s by default, `--think`; real experts take longer) before submitting, and
they start at random moments within the first pause: the load the bench puts on the server.
"flat out": no pause at all, which finds the throughput ceiling; there, latency is mostly
waiting in line (32 clients / throughput, by Little's law).

Prints p50/p99 round-trip latency of claims and submits, throughput in labels per second, the
CPU time per label of the server processes, of the PostgreSQL backends serving them (read from
/proc: the database must run on this machine) and of the clients (this process; on a shared
machine these move far less than the clock does), the cores busy over each phase, the bench's
own and everything else's (/proc/stat: flat out is bounded by the cores other work leaves
free), and the count of double assignments. Baseline, measured in the same run with the same
clients: `GET /api/me` (sign-in check and one query), so the ratio shows what the queue adds to
the cheapest authenticated request.
"""

from __future__ import annotations

import argparse
import hashlib
import http.client
import json
import os
import random
import sys
import tempfile
import threading
import time
import urllib.parse
import uuid
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from sqlalchemy import func, select

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from tests.serving import enqueue_steps, server_process  # noqa: E402


def rollout_file(path: Path, n_rollouts: int, steps: int, seed: int = 0) -> None:
    """An invented discrete-action rollout file: 3 features at 10 Hz, learner probabilities."""
    rng = np.random.default_rng(seed)
    n = n_rollouts * steps
    probs = rng.dirichlet(np.ones(3), size=n).astype(np.float32)
    probs /= probs.sum(axis=1, keepdims=True)
    table = pa.table(
        {
            "rollout": [f"bench-{r:04d}" for r in range(n_rollouts) for _ in range(steps)],
            "step": [s for _ in range(n_rollouts) for s in range(steps)],
            "time_s": [0.1 * s for _ in range(n_rollouts) for s in range(steps)],
            "features": rng.normal(size=(n, 3)).round(3).tolist(),
            "learner_action": [["proceed", "creep", "hold"][i] for i in probs.argmax(axis=1)],
            "learner_probs": probs.tolist(),
        }
    )
    pq.write_table(table, path)


def prepare(url: str, data_dir: Path, n_items: int, n_clients: int) -> list[str]:
    """Migrate an empty store, create the loop, round, rollouts and queue; return API tokens."""
    from expertloop.auth import service as auth_service
    from expertloop.db import make_engine, make_session_factory
    from expertloop.ingest import service as ingest_service
    from expertloop.loops import service as loops_service
    from expertloop.loops.schemas import LoopCreate
    from tests.serving import upgrade_empty

    upgrade_empty(url)
    engine = make_engine(url)
    with make_session_factory(engine)() as session:
        spec = LoopCreate.model_validate(
            {
                "slug": "bench-crossing",
                "title": "Benchmark crossing (invented)",
                "features": [
                    {"name": "gap_m", "unit": "m"},
                    {"name": "speed", "unit": "m/s"},
                    {"name": "occluded"},
                ],
                "action_space": {"kind": "discrete", "actions": ["proceed", "creep", "hold"]},
            }
        )
        loop = loops_service.create_loop(session, spec=spec, user_id=None)
        rnd = loops_service.open_round(session, loop=loop, learner_version="v1", user_id=None)
        session.commit()
        file = data_dir / "bench.parquet"
        rollout_file(file, n_rollouts=max(1, n_items // 100), steps=100)
        ingest_service.ingest_file(
            session,
            loop=loop,
            rnd=rnd,
            path=file,
            filename=file.name,
            file_sha256=hashlib.sha256(file.read_bytes()).hexdigest(),
            user_id=None,
            blob_dir=data_dir / "blobs",
        )
        from expertloop.ingest.models import Step

        step_ids = list(session.scalars(select(Step.id).order_by(Step.id)))[:n_items]
        enqueue_steps(session, rnd=rnd, loop=loop, step_ids=step_ids, seed=1)
        session.commit()
        tokens = []
        for i in range(n_clients):
            user = auth_service.create_user(session, name=f"bench-{i:02d}", roles=["annotator"])
            tokens.append(auth_service.issue_token(session, user=user))
        session.commit()
    engine.dispose()
    return tokens


class Annotator:
    """One annotator's kept-alive connection (the standard library's http.client).

    The clients share the machine's two cores with the server: httpx took about 1.9 ms of CPU
    a request here under load, a third of all the CPU a label cost, where http.client takes a
    fraction of that. The server's CPU per label is printed either way.
    """

    def __init__(self, base: str, token: str) -> None:
        address = urllib.parse.urlsplit(base)
        self._connection = http.client.HTTPConnection(address.hostname, address.port, timeout=60)
        self._headers = {"Authorization": f"Bearer {token}"}

    def request(self, method: str, path: str, body: Any = None) -> tuple[int, Any]:
        headers = dict(self._headers)
        data = None
        if body is not None:
            data = json.dumps(body).encode()
            headers["Content-Type"] = "application/json"
        self._connection.request(method, path, body=data, headers=headers)
        answer = self._connection.getresponse()
        raw = answer.read()
        return answer.status, json.loads(raw) if raw else None

    def close(self) -> None:
        self._connection.close()


def run_clients(base: str, tokens: list[str], work: Any) -> tuple[float, list[list[Any]]]:
    """Run `work(client, results, i)` in one thread per token, all released at once."""
    start = threading.Barrier(len(tokens) + 1)
    results: list[list[Any]] = [[] for _ in tokens]
    failures: list[BaseException] = []

    def body(i: int) -> None:
        client = Annotator(base, tokens[i])
        try:
            client.request("GET", "/api/me")  # open the connection before the clock starts
            start.wait()
            try:
                work(client, results[i], i)
            except BaseException as exc:  # reported after the run
                failures.append(exc)
        finally:
            client.close()

    threads = [threading.Thread(target=body, args=(i,)) for i in range(len(tokens))]
    for t in threads:
        t.start()
    start.wait()
    began = time.perf_counter()
    for t in threads:
        t.join()
    if failures:
        raise SystemExit(f"a client failed: {failures[0]!r}")
    return time.perf_counter() - began, results


def baseline(client: Annotator, out: list[Any], _: int, rounds: int = 40) -> None:
    for _ in range(rounds):
        t = time.perf_counter()
        assert client.request("GET", "/api/me")[0] == 200
        out.append(time.perf_counter() - t)


def claim_and_submit(
    client: Annotator, out: list[Any], *, think: float, quota: int | None, seed: int
) -> None:
    """Claim, look for `think` seconds on average, submit; until `quota` labels or none left."""
    rng = random.Random(seed)
    queue = "/api/loops/bench-crossing/queue"
    if think > 0:  # annotators do not all start in the same millisecond
        time.sleep(rng.uniform(0, think))
    while quota is None or len(out) < quota:
        t = time.perf_counter()
        status, got = client.request("POST", queue + "/claim")
        claim_s = time.perf_counter() - t
        if status != 200:
            raise SystemExit(f"claim failed: {status} {got}")
        item = got["item"]
        if item is None:
            return
        if think > 0:
            time.sleep(rng.uniform(0.5 * think, 1.5 * think))
        body = {"submission_id": uuid.uuid4().hex, "answer": "action", "action": rng.randrange(3)}
        t = time.perf_counter()
        status, sent = client.request("POST", f"{queue}/items/{item['item_id']}/labels", body)
        submit_s = time.perf_counter() - t
        if status != 201:
            raise SystemExit(f"submit failed: {status} {sent}")
        out.append((item["item_id"], claim_s, submit_s))


def double_assignments(url: str, results: list[list[Any]], k: int) -> int:
    """Items handed to more annotators than they need labels, plus items over k labels or
    labelled twice by one annotator (from the clients' records and the store)."""
    from expertloop.db import make_engine
    from expertloop.queue.models import Label

    handed = Counter(item for rows in results for item, _, _ in rows)
    over = sum(1 for n in handed.values() if n > k)
    engine = make_engine(url)
    with engine.connect() as conn:
        stored_over = conn.execute(
            select(func.count()).select_from(
                select(Label.item_id).group_by(Label.item_id).having(func.count() > k).subquery()
            )
        ).scalar_one()
        twice = conn.execute(
            select(func.count()).select_from(
                select(Label.item_id, Label.user_id)
                .group_by(Label.item_id, Label.user_id)
                .having(func.count() > 1)
                .subquery()
            )
        ).scalar_one()
    engine.dispose()
    return int(over + stored_over + twice)


def process_tree_cpu(pid: int) -> float:
    """CPU seconds (user + system) used so far by a process and its descendants still running
    (a server's workers), from /proc."""
    ticks = os.sysconf("SC_CLK_TCK")
    total, stack = 0.0, [pid]
    while stack:
        current = stack.pop()
        try:
            fields = Path(f"/proc/{current}/stat").read_text().rsplit(")", 1)[1].split()
            for task in Path(f"/proc/{current}/task").iterdir():
                stack += [int(c) for c in (task / "children").read_text().split()]
        except (FileNotFoundError, ProcessLookupError):
            continue
        total += (int(fields[11]) + int(fields[12])) / ticks  # utime, stime
    return total


def database_cpu(url: str | None) -> dict[int, float]:
    """CPU seconds used so far by each PostgreSQL backend serving a connection to the bench's
    database (the server's), from /proc: the database runs on this machine and shares its cores.
    Autovacuum and the database's other background work are not counted. Empty for SQLite,
    whose work runs inside the server's processes."""
    if url is None:
        return {}
    import psycopg
    from sqlalchemy.engine import make_url

    conninfo = make_url(url).set(drivername="postgresql").render_as_string(hide_password=False)
    with psycopg.connect(conninfo) as conn:
        pids = [
            pid
            for (pid,) in conn.execute(
                "SELECT pid FROM pg_stat_activity WHERE datname = current_database() "
                "AND backend_type = 'client backend' AND pid <> pg_backend_pid()"
            )
        ]
    return {pid: process_tree_cpu(pid) for pid in pids}


def machine_busy_cpu() -> float:
    """CPU seconds every core of the machine has spent busy since boot (/proc/stat: all but
    idle and I/O wait), whoever ran."""
    fields = Path("/proc/stat").read_text().split("\n", 1)[0].split()[1:]
    user, nice, system, _idle, _iowait, irq, softirq, steal = (int(f) for f in fields[:8])
    return (user + nice + system + irq + softirq + steal) / os.sysconf("SC_CLK_TCK")


class CpuSpent(NamedTuple):
    """CPU seconds over a phase; `database` is None on SQLite, whose work is the server's."""

    server: float
    database: float | None
    clients: float
    machine: float  # every process's, ours included


def cpu_meter(server_pid: int, database_url: str | None) -> Callable[[], CpuSpent]:
    """A function returning the CPU spent since it was made. Backends that connected meanwhile
    count from their start."""
    server0, clients0 = process_tree_cpu(server_pid), time.process_time()
    database0 = database_cpu(database_url)
    machine0 = machine_busy_cpu()

    def read() -> CpuSpent:
        database = None
        if database_url is not None:
            now = database_cpu(database_url)
            database = sum(cpu - database0.get(pid, 0.0) for pid, cpu in now.items())
        return CpuSpent(
            process_tree_cpu(server_pid) - server0,
            database,
            time.process_time() - clients0,
            machine_busy_cpu() - machine0,
        )

    return read


def percentile_ms(values: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(values), q) * 1000)


def report(
    name: str,
    rows: list[list[Any]],
    wall: float,
    me: list[float],
    cpu: CpuSpent,
) -> None:
    claims = [c for r in rows for _, c, _ in r]
    submits = [s for r in rows for _, _, s in r]
    both = claims + submits
    print(
        f"-- {name}: {len(claims)} labels in {wall:.1f} s, "
        f"{len(claims) / wall:.1f} labels/s ({len(both) / wall:.0f} requests/s)"
    )
    per_label = 1000 / max(1, len(claims))
    database = "" if cpu.database is None else f", database {cpu.database * per_label:.2f} ms"
    print(
        f"   CPU per label: server {cpu.server * per_label:.2f} ms{database}, "
        f"clients {cpu.clients * per_label:.2f} ms"
    )
    # What else ran meanwhile: on a shared machine, flat out is bounded by the cores left over.
    ours = cpu.server + (cpu.database or 0.0) + cpu.clients
    others = max(0.0, cpu.machine - ours)  # the readings are a few clock ticks apart
    print(
        f"   cores busy: {cpu.machine / wall:.2f} of {os.cpu_count()} "
        f"(this bench {ours / wall:.2f}, everything else {others / wall:.2f}, "
        "the database's background work included)"
    )
    print(f"   {'request':<22}{'p50 ms':>9}{'p99 ms':>9}")
    for label, values in (("claim", claims), ("submit", submits), ("claim or submit", both)):
        print(f"   {label:<22}{percentile_ms(values, 50):>9.1f}{percentile_ms(values, 99):>9.1f}")
    print(
        f"   p50 / p99 against the baseline: {percentile_ms(both, 50) / percentile_ms(me, 50):.2f}"
        f" / {percentile_ms(both, 99) / percentile_ms(me, 99):.2f}"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--postgres", help="PostgreSQL URL; that database is emptied")
    parser.add_argument("--workers", type=int, help="server workers (default 2 PG, 1 SQLite)")
    parser.add_argument("--clients", type=int, default=32)
    parser.add_argument("--items", type=int, default=2000)
    parser.add_argument("--paced-labels", type=int, default=15, help="labels per client, paced")
    parser.add_argument("--think", type=float, default=1.0, help="mean seconds per state, paced")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        data_dir = Path(tmp)
        url = args.postgres or f"sqlite:///{data_dir / 'bench.db'}"
        workers = args.workers or (2 if args.postgres else 1)
        tokens = prepare(url, data_dir, args.items, args.clients)
        with server_process(url, data_dir, workers=workers) as server:
            base = server.url
            _, base_rows = run_clients(base, tokens, baseline)
            meter = cpu_meter(server.pid, args.postgres)
            paced_wall, paced = run_clients(
                base,
                tokens,
                lambda c, out, i: claim_and_submit(
                    c, out, think=args.think, quota=args.paced_labels, seed=i
                ),
            )
            paced_cpu = meter()
            meter = cpu_meter(server.pid, args.postgres)
            flat_wall, flat = run_clients(
                base,
                tokens,
                lambda c, out, i: claim_and_submit(c, out, think=0.0, quota=None, seed=1000 + i),
            )
            flat_cpu = meter()
        doubles = double_assignments(url, paced + flat, k=1)
    me = [x for r in base_rows for x in r]
    backend = "PostgreSQL" if args.postgres else "SQLite"
    labelled = sum(len(r) for r in paced + flat)
    print(
        f"queue benchmark: {backend}, {workers} server worker(s), {args.clients} annotator "
        f"clients, {labelled} of {args.items} items labelled (k=1), {os.cpu_count()} CPUs, "
        f"load average {os.getloadavg()[0]:.1f}"
    )
    print(
        f"-- baseline GET /api/me: p50 {percentile_ms(me, 50):.1f} ms, "
        f"p99 {percentile_ms(me, 99):.1f} ms"
    )
    report(f"paced (think {args.think:g} s on average)", paced, paced_wall, me, paced_cpu)
    report("flat out (no think time)", flat, flat_wall, me, flat_cpu)
    print(f"double assignments: {doubles}")
    if labelled != args.items:
        raise SystemExit(f"only {labelled} of {args.items} items were labelled")


if __name__ == "__main__":
    main()
