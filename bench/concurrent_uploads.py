"""Concurrent uploads benchmark: two different rollout files uploaded at the same moment against
the same two uploaded one after the other, on a live server on loopback.

    python bench/concurrent_uploads.py                 # SQLite in a temporary folder
    python bench/concurrent_uploads.py --postgres postgresql+psycopg://postgres@127.0.0.1:5432/DBNAME
                                                       # PostgreSQL; DBNAME IS EMPTIED

Prints the wall time of the sequential pair (the baseline, measured in the same run) and of the
concurrent pair, their ratio (target: at most about 1, i.e. no worse than one after the other),
every status code (target: all 201, no 503), and the slowest `/healthz` answer while the
concurrent pair ran (target: well under a second: the server stays responsive).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx
import pyarrow.compute as pc
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench.queue_claims import rollout_file  # noqa: E402
from tests.serving import server_process  # noqa: E402

SLUG = "bench-uploads"


def prepare(url: str) -> str:
    """Migrate an empty store, create a loop with round 1 open; return an uploader's token."""
    from expertloop.auth import service as auth_service
    from expertloop.db import make_engine, make_session_factory
    from expertloop.loops import service as loops_service
    from expertloop.loops.schemas import LoopCreate
    from tests.serving import upgrade_empty

    upgrade_empty(url)
    engine = make_engine(url)
    with make_session_factory(engine)() as session:
        spec = LoopCreate.model_validate(
            {
                "slug": SLUG,
                "title": "Benchmark uploads (invented)",
                "features": [{"name": n, "unit": ""} for n in ("gap_m", "speed", "occluded")],
                "action_space": {"kind": "discrete", "actions": ["proceed", "creep", "hold"]},
            }
        )
        loop = loops_service.create_loop(session, spec=spec, user_id=None)
        loops_service.open_round(session, loop=loop, learner_version="v1", user_id=None)
        session.commit()
        user = auth_service.create_user(session, name="bench-fleet", roles=["uploader"])
        token = auth_service.issue_token(session, user=user)
        session.commit()
    engine.dispose()
    return token


def upload(base: str, token: str, path: Path, number: int = 1) -> tuple[int, float]:
    started = time.perf_counter()
    with path.open("rb") as fh:
        response = httpx.post(
            f"{base}/api/loops/{SLUG}/rounds/{number}/rollouts",
            files={"file": (path.name, fh)},
            headers={"Authorization": f"Bearer {token}"},
            timeout=300,
        )
    return response.status_code, time.perf_counter() - started


def stored_steps(url: str) -> int:
    """Steps in the store: the timed answers are only worth reading if every step landed."""
    from sqlalchemy import func, select

    from expertloop.db import make_engine, make_session_factory
    from expertloop.ingest.models import Step

    engine = make_engine(url)
    with make_session_factory(engine)() as session:
        count = int(session.scalar(select(func.count()).select_from(Step)) or 0)
    engine.dispose()
    return count


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--postgres", help="PostgreSQL URL of a database to empty and use")
    parser.add_argument("--rollouts", type=int, default=60, help="rollouts per file")
    parser.add_argument("--steps", type=int, default=300, help="steps per rollout")
    args = parser.parse_args()

    with tempfile.TemporaryDirectory() as folder:
        work = Path(folder)
        url = args.postgres or f"sqlite:///{work / 'store.db'}"
        token = prepare(url)
        files = []
        for i in range(5):  # one to warm up, two for the sequential pair, two for the concurrent
            path = work / f"rollouts-{i}.parquet"
            rollout_file(path, args.rollouts, args.steps, seed=i)
            files.append(path)
        for i, path in enumerate(files):
            table = pq.read_table(path)  # distinct rollout keys in every file
            keys = pc.binary_join_element_wise(f"f{i}", table["rollout"], "-")
            pq.write_table(table.set_column(0, "rollout", keys), path)
        size_mb = files[0].stat().st_size / 1e6

        with server_process(url, work / "data", log_path=work / "server.log") as server:
            base = server.url
            upload(base, token, files[0])  # warm the server (imports, first connection)

            started = time.perf_counter()
            sequential = [upload(base, token, files[1]), upload(base, token, files[2])]
            sequential_s = time.perf_counter() - started

            health: list[float] = []
            done = threading.Event()

            def probe() -> None:
                while not done.is_set():
                    t0 = time.perf_counter()
                    httpx.get(base + "/healthz", timeout=60)
                    health.append(time.perf_counter() - t0)
                    time.sleep(0.05)

            prober = threading.Thread(target=probe)
            prober.start()
            started = time.perf_counter()
            with ThreadPoolExecutor(2) as pool:
                concurrent = list(pool.map(lambda p: upload(base, token, p), files[3:5]))
            concurrent_s = time.perf_counter() - started
            done.set()
            prober.join()
        stored = stored_steps(url)

    print(f"files: {size_mb:.1f} MB each, {args.rollouts * args.steps} steps")
    print(
        f"sequential pair (baseline): {sequential_s:.2f} s, statuses {[s for s, _ in sequential]}"
    )
    print(f"concurrent pair: {concurrent_s:.2f} s, statuses {[s for s, _ in concurrent]}")
    print(f"steps stored: {stored} (expected {5 * args.rollouts * args.steps})")
    print(f"ratio concurrent / sequential: {concurrent_s / sequential_s:.2f}")
    print(f"slowest /healthz during the concurrent pair: {max(health) * 1000:.0f} ms")


if __name__ == "__main__":
    main()
