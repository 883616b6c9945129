"""Ingest with a camera image on every step, against the same rows without images.

    python bench/image_ingest.py --steps 20000                 # SQLite
    python bench/image_ingest.py --steps 20000 --postgres postgresql+psycopg://postgres@127.0.0.1:5432/DBNAME

Writes two Parquet files of N steps with the same rows (64 float32 features, a discrete action
with probabilities), one of them with an image column: a distinct --image-bytes image (PNG
signature, random body) on every step, written without dictionary encoding as the README advises
(--dictionary-images: with pyarrow's default, which the service reads more slowly). Each run times the service's upload path
(`ingest_file`: read, validate, hash, store the images, insert the rows, commit) on both files,
each into a fresh store and a fresh blob folder, so the baseline is measured in the same run on
the same machine. Prints every run and the ratio of the medians (rows-only time over
with-images time; target: at least 0.5x), then reads a sample of the stored images back through
the store and checks their bytes.

The PostgreSQL database named by --postgres is emptied (its public schema dropped) before every
run: name one used for nothing else.
"""

from __future__ import annotations

import argparse
import gc
import hashlib
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench.ingest import ACTIONS, N_FEATURES, open_bench_round  # noqa: E402
from expertloop.db import make_engine, make_session_factory  # noqa: E402
from expertloop.ingest import image_store, service  # noqa: E402
from tests.serving import upgrade_empty  # noqa: E402

STEPS_PER_ROLLOUT = 1000
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def make_files(
    folder: Path, n: int, image_bytes: int, *, dictionary_images: bool = False, seed: int = 0
) -> tuple[Path, Path, list]:
    """The rows-only file, the same rows with an image each, and the images. The image column
    is written without dictionary encoding, as the README advises, unless `dictionary_images`
    (pyarrow's default, which tries a dictionary for every column)."""
    rng = np.random.default_rng(seed)
    features = rng.standard_normal((n, N_FEATURES), dtype=np.float32)
    logits = rng.standard_normal((n, len(ACTIONS)))
    probs = (np.exp(logits) / np.exp(logits).sum(axis=1, keepdims=True)).astype(np.float32)
    rollout = np.arange(n) // STEPS_PER_ROLLOUT
    step = np.arange(n) % STEPS_PER_ROLLOUT
    columns = {
        "rollout": pa.array([f"bench-{r:06d}" for r in range(rollout[-1] + 1)]).take(
            pa.array(rollout)
        ),
        "step": pa.array(step, pa.int64()),
        "time_s": pa.array(step * 0.1),
        "features": pa.FixedSizeListArray.from_arrays(pa.array(features.reshape(-1)), N_FEATURES),
        "learner_action": pa.array(probs.argmax(axis=1).astype(np.int64)),
        "learner_probs": pa.FixedSizeListArray.from_arrays(
            pa.array(probs.reshape(-1)), len(ACTIONS)
        ),
    }
    rows_only = folder / "rows.parquet"
    pq.write_table(pa.table(columns), rows_only)
    body = rng.integers(0, 256, size=(n, image_bytes - len(PNG_SIGNATURE)), dtype=np.uint8)
    images = [PNG_SIGNATURE + body[i].tobytes() for i in range(n)]
    with_images = folder / "images.parquet"
    pq.write_table(
        pa.table({**columns, "image": pa.array(images, pa.binary())}),
        with_images,
        use_dictionary=True if dictionary_images else list(columns),
    )
    return rows_only, with_images, images


def service_ingest(url: str, path: Path, blob_dir: Path) -> tuple[float, float]:
    """Seconds the service's upload path takes on the file, into a fresh store: wall-clock, and
    CPU time of this process (all its threads; a database server's own work is not in it)."""
    upgrade_empty(url)
    engine = make_engine(url)
    factory = make_session_factory(engine)
    with factory() as session:
        loop, rnd = open_bench_round(session)
        gc.collect()
        started, cpu_started = time.perf_counter(), time.process_time()
        service.ingest_file(
            session,
            loop=loop,
            rnd=rnd,
            path=path,
            filename=path.name,
            file_sha256=path.stem,
            user_id=None,
            blob_dir=blob_dir,
        )
        elapsed, cpu = time.perf_counter() - started, time.process_time() - cpu_started
    engine.dispose()
    return elapsed, cpu


def check_read_back(url: str, blob_dir: Path, images: list, sample: int = 200) -> float:
    """Read a sample of the stored images back as the image endpoint does; seconds per image."""
    engine = make_engine(url)
    factory = make_session_factory(engine)
    picks = np.random.default_rng(1).choice(len(images), size=min(sample, len(images)))
    started = time.perf_counter()
    with factory() as session:
        for i in picks:
            digest = hashlib.sha256(images[i]).hexdigest()
            found = image_store.read_image(session, sha256=digest, blob_dir=blob_dir)
            assert found == images[i], f"image {i} read back wrong"
    elapsed = (time.perf_counter() - started) / len(picks)
    engine.dispose()
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawTextHelpFormatter
    )
    parser.add_argument("--steps", type=int, default=50_000)
    parser.add_argument("--image-bytes", type=int, default=20_000)
    parser.add_argument("--repeat", type=int, default=3, help="runs of each file, fresh stores")
    parser.add_argument("--postgres", metavar="URL", help="PostgreSQL instead of SQLite")
    parser.add_argument(
        "--dictionary-images",
        action="store_true",
        help="write the image column with pyarrow's default dictionary encoding",
    )
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        rows_only, with_images, images = make_files(
            folder, args.steps, args.image_bytes, dictionary_images=args.dictionary_images
        )
        print(
            f"files: {args.steps} steps, {N_FEATURES} float32 features; rows only "
            f"{rows_only.stat().st_size / 1e6:.0f} MB, with a {args.image_bytes}-byte image "
            f"each {with_images.stat().st_size / 1e6:.0f} MB (image column "
            f"{'dictionary-encoded' if args.dictionary_images else 'plain'})"
        )
        store = "PostgreSQL" if args.postgres else "SQLite"
        plain, pictured = [], []
        for run in range(args.repeat):
            db = folder / f"store-{run}.db"
            url = args.postgres or f"sqlite:///{db}"
            plain.append(service_ingest(url, rows_only, folder / f"blobs-rows-{run}"))
            db.unlink(missing_ok=True)
            blob_dir = folder / f"blobs-images-{run}"
            pictured.append(service_ingest(url, with_images, blob_dir))
            per_read = check_read_back(url, blob_dir, images)
            db.unlink(missing_ok=True)
            shutil.rmtree(blob_dir)
            (wall_a, cpu_a), (wall_b, cpu_b) = plain[-1], pictured[-1]
            print(
                f"{store} run {run + 1}: rows only {wall_a:.2f} s (CPU {cpu_a:.2f} s) | with "
                f"images {wall_b:.2f} s (CPU {cpu_b:.2f} s) | ratio {wall_a / wall_b:.2f}x "
                f"(by CPU {cpu_a / cpu_b:.2f}x) | read back {per_read * 1e3:.2f} ms an image"
            )
        mid_plain, mid_pictured = np.median(plain, axis=0), np.median(pictured, axis=0)
        print(
            f"{store} median of {args.repeat}: rows only {mid_plain[0]:.2f} s "
            f"({args.steps / mid_plain[0]:,.0f} steps/s), with images {mid_pictured[0]:.2f} s "
            f"({args.steps / mid_pictured[0]:,.0f} steps/s, "
            f"{args.steps * args.image_bytes / mid_pictured[0] / 1e6:,.0f} MB/s of images) | "
            f"ratio {mid_plain[0] / mid_pictured[0]:.2f}x, by CPU time "
            f"{mid_plain[1] / mid_pictured[1]:.2f}x (target: at least 0.5x)"
        )


if __name__ == "__main__":
    main()
