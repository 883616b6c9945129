"""Ingest benchmark: the service's upload path (validation + insert) against a raw bulk insert.

    python bench/ingest.py --steps 1000000                   # SQLite and PostgreSQL
    python bench/ingest.py --steps 200000 --backend sqlite

Writes one Parquet file of N steps (64 float32 features, a discrete action with probabilities),
times the service's ingest path on it, and in the same run a raw baseline on the same rows into an
equivalent table (binary COPY on PostgreSQL, executemany on SQLite), prepared in memory beforehand.
Each backend runs --repeat times (default 3) on a fresh store, because single runs on a shared
machine swing by a third; prints every run's steps per second and ratio, then the ratio of the
medians and of the best runs (target: at least 0.5x the baseline on both backends).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from sqlalchemy import text
from sqlalchemy.orm import Session

from expertloop.db import make_engine, make_session_factory
from expertloop.ingest import bulk, service
from expertloop.loops import service as loops_service
from expertloop.loops.models import Loop, Round
from expertloop.loops.schemas import LoopCreate
from expertloop.migrations_state import upgrade
from expertloop.shared.encode import rows_to_bytes

N_FEATURES = 64
ACTIONS = ["a0", "a1", "a2", "a3"]
STEPS_PER_ROLLOUT = 1000
PG_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/expertloop_bench"


def make_file(path: Path, n: int, seed: int = 0) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    features = rng.standard_normal((n, N_FEATURES), dtype=np.float32)
    logits = rng.standard_normal((n, len(ACTIONS)))
    probs = (np.exp(logits) / np.exp(logits).sum(axis=1, keepdims=True)).astype(np.float32)
    action = probs.argmax(axis=1)
    rollout = np.arange(n) // STEPS_PER_ROLLOUT
    step = np.arange(n) % STEPS_PER_ROLLOUT
    table = pa.table(
        {
            "rollout": pa.array([f"bench-{r:06d}" for r in range(rollout[-1] + 1)]).take(
                pa.array(rollout)
            ),
            "step": pa.array(step, pa.int64()),
            "time_s": pa.array(step * 0.1),
            "features": pa.FixedSizeListArray.from_arrays(
                pa.array(features.reshape(-1)), N_FEATURES
            ),
            "learner_action": pa.array(action.astype(np.int64)),
            "learner_probs": pa.FixedSizeListArray.from_arrays(
                pa.array(probs.reshape(-1)), len(ACTIONS)
            ),
        }
    )
    pq.write_table(table, path)
    return {
        "features": features,
        "probs": probs,
        "action": action,
        "step": step,
        "rollout": rollout,
    }


def prepare_store(url: str) -> None:
    if url.startswith("postgresql"):
        admin = make_engine(url.rsplit("/", 1)[0] + "/postgres")
        with admin.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
            conn.execute(text("DROP DATABASE IF EXISTS expertloop_bench"))
            conn.execute(text("CREATE DATABASE expertloop_bench"))
        admin.dispose()
    upgrade(url)


def open_bench_round(session: Session, n_features: int = N_FEATURES) -> tuple[Loop, Round]:
    """The benchmarks' loop (features f0, f1, ..., ACTIONS) with round 1 open, committed."""
    spec = LoopCreate.model_validate(
        {
            "slug": "bench",
            "title": "bench",
            "features": [{"name": f"f{i}", "unit": ""} for i in range(n_features)],
            "action_space": {"kind": "discrete", "actions": ACTIONS},
        }
    )
    loop = loops_service.create_loop(session, spec=spec, user_id=None)
    rnd = loops_service.open_round(session, loop=loop, learner_version="v1", user_id=None)
    session.commit()
    return loop, rnd


def service_ingest(url: str, path: Path) -> tuple[float, float]:
    """Wall-clock and CPU seconds (this process, all threads; a PostgreSQL server's own work is
    not in it) of the service's upload path."""
    engine = make_engine(url)
    factory = make_session_factory(engine)
    with factory() as session:
        loop, rnd = open_bench_round(session)
        started, cpu_started = time.perf_counter(), time.process_time()
        service.ingest_file(
            session,
            loop=loop,
            rnd=rnd,
            path=path,
            filename=path.name,
            file_sha256="bench",
            user_id=None,
            blob_dir=path.parent / "blobs",
        )
        elapsed, cpu = time.perf_counter() - started, time.process_time() - cpu_started
    engine.dispose()
    return elapsed, cpu


def baseline_insert(url: str, data: dict[str, np.ndarray]) -> float:
    """Raw insert of the same rows into a copy of the steps table, rows prepared beforehand."""
    engine = make_engine(url)
    n = len(data["step"])
    columns: dict[str, bulk.Column] = {
        "rollout_id": data["rollout"] + 1,
        "round_id": [1] * n,
        "step_index": data["step"],
        "time_s": data["step"] * 0.1,
        "control": np.zeros(n, dtype=np.int64),
        "features": rows_to_bytes(data["features"]),
        "learner_action": data["action"],
        "learner_action_vec": None,
        "expert_action": None,
        "expert_action_vec": None,
        "learner_probs": rows_to_bytes(data["probs"]),
        "learner_ensemble": None,
        "ensemble_size": None,
        "learner_std": None,
        "scene": None,
        "image_sha256": None,
    }
    # the same columns the service fills; the rest stay NULL in both
    filled = [name for name in bulk.STEP_COLUMNS if columns[name] is not None]
    rows = [row for chunk in bulk.row_chunks(columns, filled, n) for row in chunk]
    names = ", ".join(filled)
    with engine.begin() as conn:
        if url.startswith("postgresql"):
            # LIKE copies columns, defaults, indexes and checks; add the foreign keys too, so the
            # baseline pays for the same constraint checks as the steps table
            conn.execute(text("CREATE TABLE bench_steps (LIKE steps INCLUDING ALL)"))
            conn.execute(
                text(
                    "ALTER TABLE bench_steps "
                    "ADD FOREIGN KEY (rollout_id) REFERENCES rollouts (id) ON DELETE CASCADE, "
                    "ADD FOREIGN KEY (round_id) REFERENCES rounds (id) ON DELETE CASCADE"
                )
            )
        else:
            ddl = conn.execute(text("SELECT sql FROM sqlite_master WHERE name = 'steps'")).scalar()
            conn.execute(
                text(
                    str(ddl)
                    .replace('"steps"', "bench_steps")
                    .replace("steps (", "bench_steps (", 1)
                )
            )
    started = time.perf_counter()
    with engine.begin() as conn:
        if url.startswith("postgresql"):
            bulk.copy_rows(conn, "bench_steps", filled, iter(rows))
        else:
            marks = ", ".join("?" for _ in filled)
            conn.exec_driver_sql(f"INSERT INTO bench_steps ({names}) VALUES ({marks})", rows)
    elapsed = time.perf_counter() - started
    engine.dispose()
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawTextHelpFormatter
    )
    parser.add_argument("--steps", type=int, default=1_000_000)
    parser.add_argument("--backend", choices=["both", "sqlite", "postgresql"], default="both")
    parser.add_argument(
        "--repeat", type=int, default=3, help="runs per backend, each on a fresh store"
    )
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "rollouts.parquet"
        data = make_file(path, args.steps)
        size_mb = path.stat().st_size / 1e6
        print(f"file: {args.steps} steps, {N_FEATURES} float32 features, {size_mb:.0f} MB Parquet")
        backends = ["sqlite", "postgresql"] if args.backend == "both" else [args.backend]
        for backend in backends:
            label = "executemany" if backend == "sqlite" else "binary COPY"
            runs = []
            cpus: list[float] = []
            for run in range(args.repeat):
                db = Path(tmp) / f"bench-{backend}-{run}.db"
                url = f"sqlite:///{db}" if backend == "sqlite" else PG_URL
                prepare_store(url)
                ours, cpu = service_ingest(url, path)
                raw = baseline_insert(url, data)
                runs.append((ours, raw))
                cpus.append(cpu)
                db.unlink(missing_ok=True)  # a fresh file per run; the WAL goes at checkpoint
                print(
                    f"{backend:10s} run {run + 1}: service ingest (validate + insert) "
                    f"{args.steps / ours:10,.0f} steps/s ({ours:.1f} s, CPU {cpu:.2f} s) | raw {label} "
                    f"{args.steps / raw:10,.0f} steps/s ({raw:.1f} s) | ratio {raw / ours:.2f}x"
                )
            ours_s = np.array([o for o, _ in runs])
            raw_s = np.array([r for _, r in runs])
            print(
                f"{backend:10s} median of {args.repeat}: service {args.steps / np.median(ours_s):,.0f}"
                f" steps/s, raw {args.steps / np.median(raw_s):,.0f} steps/s, ratio "
                f"{np.median(raw_s) / np.median(ours_s):.2f}x | best of each: ratio "
                f"{raw_s.min() / ours_s.min():.2f}x (target: at least 0.5x) | service CPU median "
                f"{np.median(cpus):.2f} s"
            )


if __name__ == "__main__":
    main()
