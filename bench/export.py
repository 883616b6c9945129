"""Benchmark: streaming a snapshot as Parquet through the API vs pyarrow writing it from memory.

For each row count, a fresh store gets a loop with 64 features (default) and that many training
rows inserted in bulk (app.ingest.bulk.insert_steps): 90% round-0 demonstrations, 8% round-1
takeovers and 2% round-1 learner steps with one label each (relabels; --relabel-share). A uvicorn server runs in
a subprocess; the benchmark creates a snapshot, downloads its Parquet export to a file, and
reads the server's peak resident memory (VmHWM in /proc/<pid>/status). The baseline, in the same
run, is pyarrow writing the very same table (read back from the export) from memory to a file
with the same writer options (compression, dictionary columns), run between the exports; the
best of --repeat runs of each is kept, since other work on the machine skews single runs. Two
export paths are timed: the version's Parquet file, written when the snapshot was created, and
a rebuild from the store after that file was deleted (the path of a version whose file is
missing). Then the exports derived from the rows (--derived): .npz, JSON Lines, and the rows a
second version adds (v2 with a tenth more rows, pulled with since=v1), each timed from the
versions' stored Parquet files and again with those files moved aside (read from the store),
against pyarrow writing the same rows as Parquet from memory (and, for .npz, np.savez of the
same arrays). The server's peak memory covers the snapshot creation and every export. The server's
CPU time (/proc/<pid>/stat) for each pull and pyarrow's own CPU time are printed too: on a
machine shared with other work, wall-clock ratios depend on how many cores are free, CPU
seconds much less.

    python bench/export.py                          # 100k and 1M rows on SQLite
    python bench/export.py --rows 100000 --database-url postgresql+psycopg://u@host/scratch

A PostgreSQL database given here has its public schema DROPPED: name a scratch database.
Targets: export at least 0.5x pyarrow's speed; server peak under 300 MB, not growing with rows.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from sqlalchemy import insert, text

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from expertloop.auth import service as auth_service  # noqa: E402
from expertloop.db import make_engine, make_session_factory  # noqa: E402
from expertloop.ingest.bulk import STEP_COLUMNS, insert_steps  # noqa: E402
from expertloop.ingest.models import Rollout, Upload  # noqa: E402
from expertloop.loops import service as loops_service  # noqa: E402
from expertloop.loops.schemas import LoopCreate  # noqa: E402
from expertloop.queue.models import Label  # noqa: E402
from expertloop.shared.encode import rows_to_bytes  # noqa: E402
from expertloop.snapshots.export import PARQUET_COMPRESSION, PARQUET_DICTIONARY_COLUMNS  # noqa: E402
from tests.serving import server_process, upgrade_empty  # noqa: E402

STEPS_PER_ROLLOUT = 1000
SETTLE_S = 0.5
SLUG = "bench-export"


def prepare_store(
    url: str,
    n_rows: int,
    n_features: int,
    rng: np.random.Generator,
    relabel_share: float = 0.02,
    *,
    migrate: bool = True,
) -> str:
    """Migrate a fresh store (unless `migrate` is False: an empty store migrated already), fill
    it, and return a trainer's API token."""
    if migrate:
        upgrade_empty(url)
    engine = make_engine(url)
    factory = make_session_factory(engine)
    with factory() as session:
        spec = LoopCreate.model_validate(
            {
                "slug": SLUG,
                "title": "Export benchmark (invented data)",
                "features": [{"name": f"f{i}"} for i in range(n_features)],
                "action_space": {"kind": "discrete", "actions": ["proceed", "creep", "hold"]},
            }
        )
        loop = loops_service.create_loop(session, spec=spec, user_id=None)
        round_0 = loops_service.get_round(session, loop=loop, number=0)
        round_1 = loops_service.open_round(
            session, loop=loop, learner_version="bench-1", user_id=None
        )
        session.commit()
        trainer = auth_service.create_user(session, name="bench-trainer", roles=["trainer"])
        token = auth_service.issue_token(session, user=trainer)
        labeller = auth_service.create_user(session, name="bench-labeller", roles=["annotator"])
        n_round_1 = n_rows // 10
        for rnd, count in ((round_0, n_rows - n_round_1), (round_1, n_round_1)):
            # round 1 is a tenth of the rows: its learner-driven steps get one label each
            learner_share = min(1.0, relabel_share * 10) if rnd.number else 0.0
            _insert_round(
                session, loop.id, rnd.id, rnd.number, count, n_features, rng, learner_share
            )
        session.commit()
        learner = [
            r[0]
            for r in session.execute(
                text("SELECT id FROM steps WHERE round_id = :r AND control = 0 ORDER BY id"),
                {"r": round_1.id},
            )
        ]
        if not learner:
            return token
        session.execute(
            insert(Label),
            [
                {
                    "step_id": step_id,
                    "round_id": round_1.id,
                    "user_id": labeller.id,
                    "submission_id": f"bench-{step_id}",
                    "answer": "action",
                    "action": int(i % 3),
                }
                for i, step_id in enumerate(learner)
            ],
        )
        session.commit()
    engine.dispose()
    return token


def _insert_round(
    session, loop_id, round_id, number, count, n_features, rng, learner_share
) -> None:  # type: ignore[no-untyped-def]
    upload = Upload(
        round_id=round_id,
        file_sha256=f"{number:064d}",
        filename="bench",
        file_format="parquet",
        n_rollouts=0,
        n_steps=count,
    )
    session.add(upload)
    session.flush()
    n_rollouts = -(-count // STEPS_PER_ROLLOUT)
    rollout_ids = [
        r[0]
        for r in session.execute(
            insert(Rollout).returning(Rollout.id),
            [
                {
                    "loop_id": loop_id,
                    "round_id": round_id,
                    "upload_id": upload.id,
                    "key": f"bench-r{number}-{k:06d}",
                    "n_steps": min(STEPS_PER_ROLLOUT, count - k * STEPS_PER_ROLLOUT),
                    "content_sha256": f"{k:064d}",
                }
                for k in range(n_rollouts)
            ],
        )
    ]
    index = np.arange(count)
    # round 0: every step a demonstration; round 1: takeovers and learner-driven steps
    expert = (index % 1000) >= round(1000 * learner_share)
    columns: dict[str, object] = dict.fromkeys(STEP_COLUMNS)
    columns |= {
        "rollout_id": np.asarray(rollout_ids)[index // STEPS_PER_ROLLOUT],
        "round_id": [round_id] * count,
        "step_index": index % STEPS_PER_ROLLOUT,
        "time_s": (index % STEPS_PER_ROLLOUT) * 0.1,
        "control": expert.astype(np.int64),
        "features": rows_to_bytes(rng.normal(size=(count, n_features)).astype(np.float32)),
        "expert_action": [int(a) if e else None for a, e in zip(index % 3, expert, strict=True)],
    }
    insert_steps(session.connection(), columns, count)  # type: ignore[arg-type]


def _download(api: httpx.Client, target: Path, version: str = "v1", **params: str) -> float:
    """Seconds to stream an export of `version` (Parquet unless `format` says) into a file."""
    started = time.perf_counter()
    with (
        api.stream(
            "GET", f"/api/loops/{SLUG}/snapshots/{version}/export", params=params
        ) as response,
        target.open("wb") as handle,
    ):
        response.raise_for_status()
        for chunk in response.iter_raw():
            handle.write(chunk)
    return time.perf_counter() - started


def _pyarrow_write(table: pa.Table, target: Path) -> tuple[float, float]:
    """Seconds, and CPU seconds of this process, for pyarrow to write the table from memory
    with the export's writer options."""
    started, cpu = time.perf_counter(), time.process_time()
    pq.write_table(
        table, target, compression=PARQUET_COMPRESSION, use_dictionary=PARQUET_DICTIONARY_COLUMNS
    )
    return time.perf_counter() - started, time.process_time() - cpu


def cpu_seconds(pid: int) -> float:
    """CPU time (user + system) a process has used so far, from /proc/<pid>/stat."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _timed_download(
    api: httpx.Client, target: Path, pid: int, version: str = "v1", **params: str
) -> tuple[float, float]:
    """Seconds of a download, and CPU seconds the server spent on it (load-independent)."""
    cpu = cpu_seconds(pid)
    seconds = _download(api, target, version, **params)
    return seconds, cpu_seconds(pid) - cpu


def _peak_of_download(
    api: httpx.Client, target: Path, pid: int, version: str, **params: str
) -> tuple[float, float, float]:
    """`_timed_download`, and the server's peak resident memory during it (VmHWM reset first,
    through /proc/<pid>/clear_refs: the caller keeps the peak from before). The reset waits
    SETTLE_S: the server hands back the last pull's pages as its stream closes, just after the
    client has the last byte."""
    time.sleep(SETTLE_S)
    Path(f"/proc/{pid}/clear_refs").write_text("5")
    seconds, cpu = _timed_download(api, target, pid, version, **params)
    return seconds, cpu, peak_rss_mb(pid)


def peak_rss_mb(pid: int) -> float:
    """Peak resident memory of a process (VmHWM), in MB."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    raise RuntimeError("no VmHWM in /proc status")


def run_once(
    url: str,
    n_rows: int,
    n_features: int,
    workdir: Path,
    relabel_share: float,
    repeat: int,
    formats: list[str],
) -> dict[str, Any]:
    rng = np.random.default_rng(n_rows)
    load = os.getloadavg()[0]  # other work on the machine skews every figure
    started = time.perf_counter()
    token = prepare_store(url, n_rows, n_features, rng, relabel_share)
    fill_s = time.perf_counter() - started
    with server_process(url, workdir / "data") as server:
        idle_mb = peak_rss_mb(server.pid)
        headers = {"Authorization": f"Bearer {token}"}
        timeout = httpx.Timeout(600.0)
        with httpx.Client(base_url=server.url, headers=headers, timeout=timeout) as api:
            started, cpu = time.perf_counter(), cpu_seconds(server.pid)
            made = api.post(f"/api/loops/{SLUG}/snapshots", json={})
            create_s = time.perf_counter() - started
            create_cpu = cpu_seconds(server.pid) - cpu
            made.raise_for_status()
            created_mb = peak_rss_mb(server.pid)
            assert made.json()["row_count"] == n_rows, made.json()["row_count"]
            target = workdir / "export.parquet"
            export_times, rebuild_times, pyarrow_times = [], [], []
            stored = sorted((workdir / "data" / "snapshots").rglob("*.parquet"))
            assert len(stored) == 1, stored  # written when the version was made
            for _ in range(repeat):
                export_times.append(_timed_download(api, target, server.pid))
                # the baseline runs between exports, under the same load on the machine
                table = pq.read_table(target)
                assert table.num_rows == n_rows
                pyarrow_times.append(_pyarrow_write(table, workdir / "baseline.parquet"))
                del table
                # the path without the stored file: rows read from the store (and stored again)
                for path in stored[0].parent.iterdir():
                    path.unlink()
                rebuild_times.append(_timed_download(api, target, server.pid))
                assert stored[0].exists()
            parquet_mb = server_mb = peak_rss_mb(server.pid)  # creation and the Parquet pulls
            derived = _derived_exports(
                api, url, server.pid, workdir, n_rows, n_features, rng, formats, repeat
            )
        server_mb = np.nanmax([server_mb, *(d[k] for d in derived.values() for k in _PEAKS)])
    (export_s, _), (pyarrow_s, _), (rebuild_s, _) = (
        min(export_times),
        min(pyarrow_times),
        min(rebuild_times),
    )
    # CPU seconds: the least of the runs, like the times
    pyarrow_cpu = min(cpu for _, cpu in pyarrow_times)
    rebuild_cpu = min(cpu for _, cpu in rebuild_times)
    return {
        "rows": n_rows,
        "fill_s": fill_s,
        "create_s": create_s,
        "create_cpu": create_cpu,
        "export_s": export_s,
        "rebuild_s": rebuild_s,
        "pyarrow_s": pyarrow_s,
        "ratio": pyarrow_s / export_s,
        "rebuild_ratio": pyarrow_s / rebuild_s,
        "pyarrow_cpu": pyarrow_cpu,
        "rebuild_cpu": rebuild_cpu,
        "cpu_ratio": pyarrow_cpu / rebuild_cpu,
        "idle_mb": idle_mb,
        "created_mb": created_mb,
        "peak_mb": server_mb,
        "parquet_peak_mb": parquet_mb,
        "file_mb": target.stat().st_size / 1e6,
        "load": load,
        "derived": derived,
    }


def add_round(url: str, n_rows: int, n_features: int, rng: np.random.Generator) -> None:
    """Round 2 of the benchmark loop: `n_rows` new takeover steps (the rows a v2 adds)."""
    engine = make_engine(url)
    factory = make_session_factory(engine)
    with factory() as session:
        loop = loops_service.get_loop(session, slug=SLUG)
        round_2 = loops_service.open_round(
            session, loop=loop, learner_version="bench-2", user_id=None
        )
        session.commit()
        _insert_round(session, loop.id, round_2.id, round_2.number, n_rows, n_features, rng, 0.0)
        session.commit()
    engine.dispose()


def _moved_aside(folder: Path, aside: Path) -> list[tuple[Path, Path]]:
    """Move every stored file (and its hash) out of `folder`; the moves, to undo them."""
    aside.mkdir(exist_ok=True)
    moves = [(path, aside / path.name) for path in sorted(folder.rglob("*")) if path.is_file()]
    for source, target in moves:
        source.rename(target)
    return moves


def _timed_both_ways(
    api: httpx.Client,
    target: Path,
    pid: int,
    stored_dir: Path,
    aside: Path,
    repeat: int,
    version: str,
    **params: str,
) -> tuple[list[tuple[float, float, float]], list[tuple[float, float, float]]]:
    """An export timed `repeat` times from the stored files and from the store (files aside),
    with the server's peak memory during each pull."""
    from_files, from_store = [], []
    for _ in range(repeat):
        from_files.append(_peak_of_download(api, target, pid, version, **params))
        moves = _moved_aside(stored_dir, aside)
        from_store.append(_peak_of_download(api, target, pid, version, **params))
        for back, away in moves:
            away.rename(back)
    return from_files, from_store


_PEAKS = ("create_v2_peak_mb", "file_peak_mb", "store_peak_mb")


def _derived_exports(
    api: httpx.Client,
    url: str,
    pid: int,
    workdir: Path,
    n_rows: int,
    n_features: int,
    rng: np.random.Generator,
    formats: list[str],
    repeat: int,
) -> dict[str, dict[str, float]]:
    """.npz, JSON Lines and an incremental export, from the stored files and from the store,
    each against a library writing the same rows from memory (pyarrow's Parquet writer; for
    .npz numpy's own savez as well)."""
    stored_dir, aside = workdir / "data" / "snapshots", workdir / "aside"
    out: dict[str, dict[str, float]] = {}
    for fmt in formats:
        target = workdir / f"export.{fmt}"
        create_v2_mb = float("nan")  # the server's peak while v2 is made (since= only)
        if fmt == "since":
            add_round(url, n_rows // 10, n_features, rng)
            Path(f"/proc/{pid}/clear_refs").write_text("5")
            api.post(f"/api/loops/{SLUG}/snapshots", json={}).raise_for_status()
            create_v2_mb = peak_rss_mb(pid)
            times = _timed_both_ways(api, target, pid, stored_dir, aside, repeat, "v2", since="v1")
        else:
            times = _timed_both_ways(api, target, pid, stored_dir, aside, repeat, "v1", format=fmt)
        numpy_s = float("nan")
        if fmt == "npz":
            with np.load(target) as archive:
                arrays = {name: archive[name] for name in archive.files}
            numpy_s = min(_numpy_savez(arrays, workdir / "baseline.npz") for _ in range(repeat))
            del arrays
        # the same rows as Parquet: the since= pull itself, else v1's full export pulled above
        table = pq.read_table(target if fmt == "since" else workdir / "export.parquet")
        rows = table.num_rows
        pyarrow_s = min(
            _pyarrow_write(table, workdir / "baseline.parquet")[0] for _ in range(repeat)
        )
        del table
        (file_s, file_cpu, _), (store_s, store_cpu, _) = (min(t) for t in times)
        out[fmt] = {
            "create_v2_peak_mb": create_v2_mb,
            "file_peak_mb": max(peak for _, _, peak in times[0]),
            "store_peak_mb": max(peak for _, _, peak in times[1]),
            "rows": rows,
            "file_s": file_s,
            "file_cpu": file_cpu,
            "store_s": store_s,
            "store_cpu": store_cpu,
            "pyarrow_s": pyarrow_s,
            "numpy_s": numpy_s,
        }
    return out


def _numpy_savez(arrays: dict[str, np.ndarray], target: Path) -> float:
    started = time.perf_counter()
    np.savez(target, **arrays)
    return time.perf_counter() - started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rows", type=int, nargs="+", default=[100_000, 1_000_000])
    parser.add_argument("--features", type=int, default=64)
    parser.add_argument(
        "--repeat", type=int, default=3, help="exports (and baseline writes) per size; best kept"
    )
    parser.add_argument(
        "--relabel-share",
        type=float,
        default=0.02,
        help="share of rows that are relabelled states (one label each), at most 0.1",
    )
    parser.add_argument(
        "--derived",
        default="npz,since",
        help="exports derived from the rows besides Parquet, comma-separated: npz, jsonl, since "
        "(v2 with a tenth more rows, since v1), or none",
    )
    parser.add_argument(
        "--database-url",
        default=None,
        help="scratch database (its schema is dropped); default: a fresh SQLite file per run",
    )
    args = parser.parse_args()
    formats = [] if args.derived == "none" else args.derived.split(",")
    unknown = set(formats) - {"npz", "jsonl", "since"}
    if unknown:
        parser.error(f"--derived: unknown {sorted(unknown)}")
    results = []
    for n_rows in args.rows:
        with tempfile.TemporaryDirectory(prefix="bench-export-") as folder:
            workdir = Path(folder)
            url = args.database_url or f"sqlite:///{workdir / 'store.db'}"
            result = run_once(
                url, n_rows, args.features, workdir, args.relabel_share, args.repeat, formats
            )
            results.append(result)
            print(
                f"{n_rows:>9} rows x {args.features} features: store filled in "
                f"{result['fill_s']:.1f} s; snapshot created (one pass: content hash and its "
                f"Parquet file) in {result['create_s']:.2f} s, {result['create_cpu']:.2f} s of "
                f"server CPU; server peak then {result['created_mb']:.0f} MB, "
                f"{result['parquet_peak_mb']:.0f} MB after the Parquet pulls",
                flush=True,
            )
    backend = "PostgreSQL" if (args.database_url or "").startswith("postgresql") else "SQLite"
    print(
        f"\nstore: {backend}; Parquet compression: {PARQUET_COMPRESSION}; relabelled share "
        f"{args.relabel_share:.0%}; {os.cpu_count()} CPUs"
    )
    print(
        f"{'rows':>9}  {'export s':>9}  {'rows/s':>10}  {'pyarrow s':>9}  {'speed':>7}"
        f"  {'rebuilt s':>9}  {'speed':>7}  {'CPU s':>6}  {'pyarrow':>7}  {'by CPU':>7}"
        f"  {'server idle MB':>14}  {'server peak MB':>14}  {'file MB':>8}  {'load avg':>8}"
    )
    for r in results:
        print(
            f"{r['rows']:>9}  {r['export_s']:>9.2f}  {r['rows'] / r['export_s']:>10.0f}  "
            f"{r['pyarrow_s']:>9.2f}  {r['ratio']:>6.2f}x  {r['rebuild_s']:>9.2f}  "
            f"{r['rebuild_ratio']:>6.2f}x  {r['rebuild_cpu']:>6.2f}  {r['pyarrow_cpu']:>7.2f}  "
            f"{r['cpu_ratio']:>6.2f}x  {r['idle_mb']:>14.0f}  {r['peak_mb']:>14.0f}  "
            f"{r['file_mb']:>8.0f}  {r['load']:>8.1f}"
        )
    print(
        "export: the version's stored Parquet file streamed through the API; rebuilt: the same "
        "export with the file deleted first (rows read from the store, file stored again); "
        "speed: pyarrow's time over ours; CPU s: server CPU time of the rebuilt pull, against "
        "pyarrow's CPU time for its write (by CPU: their ratio, which other work on the machine "
        "does not skew)"
    )
    if formats:
        print(
            f"\n{'rows':>9}  {'export':>14}  {'rows out':>9}  {'file s':>7}  {'CPU':>5}  "
            f"{'speed':>6}  {'store s':>7}  {'CPU':>5}  {'speed':>6}  {'pyarrow s':>9}  "
            f"{'numpy s':>7}  {'peak MB: file':>13}  {'store':>5}"
        )
    for r in results:
        for fmt, d in r["derived"].items():
            name = "since=v1 (v2)" if fmt == "since" else fmt
            print(
                f"{r['rows']:>9}  {name:>14}  {d['rows']:>9}  {d['file_s']:>7.2f}  "
                f"{d['file_cpu']:>5.2f}  {d['pyarrow_s'] / d['file_s']:>5.2f}x  "
                f"{d['store_s']:>7.2f}  {d['store_cpu']:>5.2f}  "
                f"{d['pyarrow_s'] / d['store_s']:>5.2f}x  {d['pyarrow_s']:>9.2f}  "
                f"{d['numpy_s']:>7.2f}  {d['file_peak_mb']:>13.0f}  {d['store_peak_mb']:>5.0f}"
            )
    for r in results:
        if "since" in r["derived"]:
            peak = r["derived"]["since"]["create_v2_peak_mb"]
            print(f"{r['rows']:>9}  server peak while v2 was created: {peak:.0f} MB")
    if formats:
        print(
            "derived exports: file = decoded from the versions' stored Parquet files; store = "
            "the same pull with those files moved aside; speed: pyarrow's time to write the same "
            "rows (as Parquet, from memory) over ours; numpy s: np.savez of the same arrays; peak MB: "
            "the server's peak resident memory during the pulls (the most of the runs)"
        )
    print("targets: speed >= 0.5x pyarrow; server peak < 300 MB and not growing with rows")


if __name__ == "__main__":
    main()
