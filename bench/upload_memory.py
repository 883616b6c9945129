"""Server memory while it ingests one large upload: peak resident memory above idle, and time.

    python bench/upload_memory.py                          # ~100 MB and ~1 GB files, SQLite
    python bench/upload_memory.py --sizes-mb 100           # only the ~100 MB files
    python bench/upload_memory.py --postgres postgresql+psycopg://postgres@127.0.0.1:5432/DBNAME
                                                           # PostgreSQL; DBNAME IS EMPTIED

For each size, two Parquet files of invented rows (64 float32 features, a discrete action with
probabilities, 1,000 steps a rollout): rows only, and rows with a distinct 20 KB image each
(the image column written without a dictionary, as the README advises); `--kinds unsorted`
adds a rows-only file whose 1,000 rollouts' steps are interleaved (no row sorted); `--kinds wide`
a rows-only file with one float32 column per feature (`--wide-columns`, default 2,000, for a
loop of that many features) instead of the `features` list, written as ONE row group; `--format
jsonl` or `npz` sends the same rows as JSON Lines (images in base64) or a compressed .npz (a wide
file: one member per feature). Each file is uploaded
through the API to a fresh server process (uvicorn, as deployed) on a fresh store; before the
upload the server is warmed with a small file, then its peak resident memory is reset
(/proc/PID/clear_refs) and its resident memory read as "idle". The answer's status and the
stored step count are checked. Prints the server's peak resident memory (VmHWM) above idle,
the upload's wall time and the server's CPU time, per file. The upload limits are raised
(EXPERTLOOP_MAX_UPLOAD_BYTES, EXPERTLOOP_MAX_ARRAY_BYTES) so that a 1 GB file is taken.

Run it on the code before a change (same command, other checkout) for the baseline figures.
"""

from __future__ import annotations

import argparse
import base64
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.concurrent_uploads import stored_steps  # noqa: E402
from bench.ingest import ACTIONS, N_FEATURES  # noqa: E402
from tests.serving import server_process, upgrade_empty  # noqa: E402

SLUG = "bench"
STEPS_PER_ROLLOUT = 1000
WRITE_ROWS = 50_000  # rows per written row group (images: fewer, see make_file)
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
INTERLEAVED_ROLLOUTS = 1000


def prepare(url: str, n_features: int = N_FEATURES) -> str:
    """Migrate an empty store, create the benchmarks' loop (bench/ingest.py: 64 features unless
    told) with round 1 open; return an uploader's token."""
    from bench.ingest import open_bench_round
    from expertloop.auth import service as auth_service
    from expertloop.db import make_engine, make_session_factory

    upgrade_empty(url)
    engine = make_engine(url)
    with make_session_factory(engine)() as session:
        open_bench_round(session, n_features)
        user = auth_service.create_user(session, name="bench-fleet", roles=["uploader"])
        token = auth_service.issue_token(session, user=user)
        session.commit()
    engine.dispose()
    return token


def _rows(
    rng: np.random.Generator, start: int, n: int, image_bytes: int, interleaved: bool = False
) -> pa.Table:
    index = np.arange(start, start + n)
    rollout = index // STEPS_PER_ROLLOUT
    step = index % STEPS_PER_ROLLOUT
    if interleaved:  # a step of every rollout in turn: no row follows its predecessor
        rollout, step = index % INTERLEAVED_ROLLOUTS, index // INTERLEAVED_ROLLOUTS
    features = rng.standard_normal((n, N_FEATURES), dtype=np.float32)
    probs = rng.dirichlet(np.ones(len(ACTIONS)), size=n).astype(np.float32)
    probs /= probs.sum(axis=1, keepdims=True)
    columns = {
        "rollout": pa.array([f"mem-{r:07d}" for r in rollout]),
        "step": pa.array(step, pa.int64()),
        "time_s": pa.array(step * 0.1),
        "features": pa.FixedSizeListArray.from_arrays(pa.array(features.reshape(-1)), N_FEATURES),
        "learner_action": pa.array(probs.argmax(axis=1).astype(np.int64)),
        "learner_probs": pa.FixedSizeListArray.from_arrays(
            pa.array(probs.reshape(-1)), len(ACTIONS)
        ),
    }
    if image_bytes:
        body = rng.integers(0, 256, size=(n, image_bytes - len(PNG_SIGNATURE)), dtype=np.uint8)
        columns["image"] = pa.array(
            [PNG_SIGNATURE + body[i].tobytes() for i in range(n)], pa.binary()
        )
    return pa.table(columns)


def _wide_rows(rng: np.random.Generator, start: int, n: int, n_features: int) -> pa.Table:
    """As _rows, with one float32 column per feature (f0, f1, ...) instead of `features`."""
    table = _rows(rng, start, n, 0)
    columns = {name: table[name] for name in table.column_names if name != "features"}
    values = rng.standard_normal((n_features, n), dtype=np.float32)  # a feature's column per row
    columns.update({f"f{j}": pa.array(values[j]) for j in range(n_features)})
    return pa.table(columns)


def make_wide_file(path: Path, target_bytes: int, n_features: int) -> int:
    """One row group of about `target_bytes`, pyarrow's defaults otherwise (so each feature is
    dictionary-encoded: about 6 bytes a value); return its rows."""
    rows = max(STEPS_PER_ROLLOUT, target_bytes // (6 * n_features + 40))
    table = _wide_rows(np.random.default_rng(0), 0, rows, n_features)
    pq.write_table(table, path, row_group_size=rows)
    return rows


def make_file(
    path: Path, target_bytes: int, image_bytes: int, *, interleaved: bool = False, seed: int = 0
) -> int:
    """Write row groups until the file reaches `target_bytes`; return the number of rows."""
    rng = np.random.default_rng(seed)
    per_write = WRITE_ROWS if not image_bytes else max(1000, (64 << 20) // image_bytes)
    first = _rows(rng, 0, per_write, image_bytes, interleaved)
    plain = [n for n in first.column_names if n != "image"]
    with pq.ParquetWriter(path, first.schema, use_dictionary=plain) as writer:
        writer.write_table(first)
        rows = per_write
        while path.stat().st_size < target_bytes:
            writer.write_table(_rows(rng, rows, per_write, image_bytes, interleaved))
            rows += per_write
    return rows


def convert(path: Path, file_format: str) -> Path:
    """The Parquet file's rows as JSON Lines (images in base64) or a compressed .npz."""
    if file_format == "parquet":
        return path
    out = path.with_suffix(f".{file_format}")
    if file_format == "jsonl":
        with out.open("w") as fh:
            for batch in pq.ParquetFile(path).iter_batches(batch_size=10_000):
                for row in batch.to_pylist():
                    if row.get("image") is not None:
                        row["image"] = base64.b64encode(row["image"]).decode()
                    fh.write(json.dumps(row) + "\n")
    else:
        table = pq.read_table(path)
        arrays = {}
        for name in table.column_names:
            column = table[name].combine_chunks()
            if pa.types.is_fixed_size_list(column.type):
                width = column.type.list_size
                arrays[name] = column.flatten().to_numpy().reshape(-1, width)
            elif name in ("rollout", "image"):
                arrays[name] = np.array(column.to_pylist(), dtype="S" if name == "image" else "U")
            else:
                arrays[name] = column.to_numpy()
        del table
        np.savez_compressed(out, **arrays)
    path.unlink()
    return out


def _status_kb(pid: int, field: str) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    raise KeyError(field)


def _cpu_s(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    ticks = os.sysconf("SC_CLK_TCK")
    return (int(fields[11]) + int(fields[12])) / ticks  # utime + stime


def upload(base: str, token: str, path: Path) -> httpx.Response:
    with path.open("rb") as fh:
        return httpx.post(
            f"{base}/api/loops/{SLUG}/rounds/1/rollouts",
            files={"file": (path.name, fh)},
            headers={"Authorization": f"Bearer {token}"},
            timeout=3600,
        )


def measure(
    work: Path, url: str, path: Path, warm: Path, rows: int, n_features: int = N_FEATURES
) -> dict[str, float]:
    token = prepare(url, n_features)
    with server_process(url, work / "data", log_path=work / "server.log") as server:
        assert upload(server.url, token, warm).status_code == 201
        Path(f"/proc/{server.pid}/clear_refs").write_text("5")  # reset VmHWM to VmRSS
        idle_kb = _status_kb(server.pid, "VmRSS")
        cpu0, started = _cpu_s(server.pid), time.perf_counter()
        answer = upload(server.url, token, path)
        elapsed = time.perf_counter() - started
        cpu = _cpu_s(server.pid) - cpu0
        peak_kb = _status_kb(server.pid, "VmHWM")
    if answer.status_code != 201:
        raise RuntimeError(f"upload answered {answer.status_code}: {answer.text[:300]}")
    stored = stored_steps(url)
    expected = rows + 1000  # the warm-up file's steps too
    if stored != expected:
        raise RuntimeError(f"{stored} steps stored, expected {expected}")
    return {
        "idle_mb": idle_kb / 1024,
        "peak_above_idle_mb": (peak_kb - idle_kb) / 1024,
        "wall_s": elapsed,
        "cpu_s": cpu,
    }


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawTextHelpFormatter
    )
    parser.add_argument("--sizes-mb", type=int, nargs="+", default=[100, 1000])
    parser.add_argument("--image-bytes", type=int, default=20_000)
    parser.add_argument(
        "--kinds",
        nargs="+",
        default=["rows", "images"],
        choices=["rows", "images", "unsorted", "wide"],
        help="unsorted: rows only, every rollout's steps interleaved with the others'; "
        "wide: one column per feature, one row group",
    )
    parser.add_argument(
        "--wide-columns", type=int, default=2000, help="features of the wide kind (and its loop)"
    )
    parser.add_argument("--format", choices=["parquet", "jsonl", "npz"], default="parquet")
    parser.add_argument("--postgres", metavar="URL", help="PostgreSQL instead of SQLite")
    parser.add_argument("--folder", type=Path, help="work folder (default: a temporary one)")
    args = parser.parse_args()
    os.environ["EXPERTLOOP_MAX_UPLOAD_BYTES"] = str(4 << 30)
    os.environ["EXPERTLOOP_MAX_ARRAY_BYTES"] = str(8 << 30)
    with tempfile.TemporaryDirectory(dir=args.folder) as tmp:
        folder = Path(tmp)
        warm = folder / "warm.parquet"
        pq.write_table(_rows(np.random.default_rng(9), 10**8, 1000, 0), warm)
        warm_wide = folder / "warm-wide.parquet"  # a warm-up file for the wide kind's loop
        if "wide" in args.kinds:
            warm_rows = _wide_rows(np.random.default_rng(9), 10**8, 1000, args.wide_columns)
            pq.write_table(warm_rows, warm_wide)
        store = "PostgreSQL" if args.postgres else "SQLite"
        for size in args.sizes_mb:
            for kind in args.kinds:
                path = folder / f"{kind}-{size}.parquet"
                if kind == "wide":
                    rows = make_wide_file(path, size * 10**6, args.wide_columns)
                else:
                    rows = make_file(
                        path,
                        size * 10**6,
                        args.image_bytes if kind == "images" else 0,
                        interleaved=kind == "unsorted",
                    )
                path = convert(path, args.format)
                run = folder / f"run-{kind}-{size}"
                url = args.postgres or f"sqlite:///{run / 'store.db'}"
                run.mkdir()
                if kind == "wide":
                    got = measure(run, url, path, warm_wide, rows, args.wide_columns)
                else:
                    got = measure(run, url, path, warm, rows)
                print(
                    f"{store} {args.format:7s} {kind:8s} {path.stat().st_size / 1e6:7.0f} MB {rows:>9,} steps | "
                    f"server peak above idle {got['peak_above_idle_mb']:7.0f} MB "
                    f"(idle {got['idle_mb']:.0f} MB) | upload {got['wall_s']:6.1f} s, "
                    f"server CPU {got['cpu_s']:6.1f} s",
                    flush=True,
                )
                path.unlink()


if __name__ == "__main__":
    main()
