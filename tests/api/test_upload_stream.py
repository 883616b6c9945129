"""Uploads stream: a file read in many small batches stores the rows, rollouts and images the
whole-file path stores; a refusal in a late batch gives the whole-file path's message and leaves
the store (and the upload folder) as it was, also with two uploads at once; and the traced
memory of a file many batches long stays below a bound the whole-file path passes."""

from __future__ import annotations

import base64
import gc
import hashlib
import re
import tracemalloc
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlalchemy import select, text
from sqlalchemy.orm import Session

from expertloop.errors import InvalidInput, TooLarge
from expertloop.ingest import service, staging, stream_read
from expertloop.ingest.formats import read_table
from expertloop.ingest.validate import validate
from expertloop.loops.models import Loop, Round
from expertloop.loops.spec import spec_of
from tests.conftest import store_contents
from tests.helpers import DISCRETE_SPEC, discrete_rows, jsonl_bytes, npz_bytes, parquet_bytes
from tests.unit.test_upload_staging import discrete_columns, per_feature, shuffled

SLUG = DISCRETE_SPEC["slug"]
URL = f"/api/loops/{SLUG}/rounds/1/rollouts"
OTHER = "aisle-crossing-whole"


@pytest.fixture
def small_batches(monkeypatch):
    """Tables of at most 16 rows, read back 10 at a time."""
    monkeypatch.setattr(stream_read, "MAX_BATCH_ROWS", 16)
    monkeypatch.setattr(stream_read, "BATCH_BYTES", 4096)
    monkeypatch.setattr(staging, "CHUNK_ROWS", 10)


@pytest.fixture
def loops(client, admin):
    """The test loop, and a second one like it for the whole-file path, each with round 1."""
    for slug in (SLUG, OTHER):
        spec = {**DISCRETE_SPEC, "slug": slug}
        assert client.post("/api/loops", json=spec, headers=admin).status_code == 201
        opened = client.post(
            f"/api/loops/{slug}/rounds", json={"learner_version": "v1"}, headers=admin
        )
        assert opened.status_code == 201, opened.text
    return SLUG


def send(client, headers, data: bytes, name: str = "a.parquet"):
    return client.post(URL, files={"file": (name, data)}, headers=headers)


def loop_and_round(session: Session, slug: str) -> tuple[Loop, Round]:
    loop = session.scalar(select(Loop).where(Loop.slug == slug))
    assert loop is not None
    rnd = session.scalar(select(Round).where(Round.loop_id == loop.id, Round.number == 1))
    assert rnd is not None
    return loop, rnd


def whole_file_store(engine, settings, path: Path, kind: str) -> None:
    """Store a file into the second loop the way uploads were stored before they streamed: the
    whole table read and validated at once (formats.read_table, validate.validate)."""
    with Session(engine) as session:
        loop, rnd = loop_and_round(session, OTHER)
        batch = validate(read_table(path, kind), spec_of(loop), round_number=1)
        session.commit()
        service._store_validated(
            session, loop, rnd, batch, path.name, kind, "whole-" + kind, None, settings.blob_dir
        )


STEP_FIELDS = (
    "step_index, time_s, control, features, learner_action, learner_action_vec, expert_action, "
    "expert_action_vec, learner_probs, learner_ensemble, ensemble_size, learner_std, scene, "
    "image_sha256"
)


def stored(engine, slug: str) -> dict[str, object]:
    """A loop's rollouts (key, robot, steps, content hash) and steps, by key and step."""
    with engine.connect() as conn:
        rollouts = conn.execute(
            text(
                "SELECT r.key, r.robot, r.n_steps, r.content_sha256 FROM rollouts r "
                "JOIN loops l ON l.id = r.loop_id WHERE l.slug = :slug ORDER BY r.key"
            ),
            {"slug": slug},
        ).all()
        steps = conn.execute(
            text(
                f"SELECT r.key, {', '.join('s.' + f.strip() for f in STEP_FIELDS.split(','))} "
                "FROM steps s JOIN rollouts r ON r.id = s.rollout_id "
                "JOIN loops l ON l.id = r.loop_id WHERE l.slug = :slug "
                "ORDER BY r.key, s.step_index"
            ),
            {"slug": slug},
        ).all()
    return {
        "rollouts": [tuple(r) for r in rollouts],
        "steps": [tuple(bytes(v) if isinstance(v, memoryview) else v for v in s) for s in steps],
    }


def as_file(tmp_path: Path, cols: dict, kind: str) -> Path:
    path = tmp_path / f"rows.{kind}"
    if kind == "parquet":
        pq.write_table(pa.table(cols), path, row_group_size=12)
    else:
        encoded = {
            **cols,
            "image": [None if v is None else base64.b64encode(v).decode() for v in cols["image"]],
        }
        path.write_bytes(jsonl_bytes(encoded))
    return path


@pytest.mark.parametrize("kind", ["parquet", "jsonl"])
@pytest.mark.parametrize("order", ["sorted", "unsorted"])
def test_a_streamed_upload_stores_what_the_whole_file_path_stores(
    client, loops, uploader, admin, engine, settings, tmp_path, small_batches, kind, order
):
    cols = discrete_columns(n_rollouts=6, steps=11)
    if order == "sorted":
        keys = sorted(range(len(cols["rollout"])), key=lambda i: (cols["rollout"][i], i))
        cols = {k: [v[i] for i in keys] for k, v in cols.items()}
    else:
        cols = shuffled(cols)
    path = as_file(tmp_path, cols, kind)
    response = send(client, uploader, path.read_bytes(), path.name)
    assert response.status_code == 201, response.text
    assert response.json()["steps"] == len(cols["rollout"])
    images_after_stream = store_contents(engine)["images"]
    whole_file_store(engine, settings, path, kind)
    streamed, whole = stored(engine, SLUG), stored(engine, OTHER)
    assert streamed["rollouts"] == whole["rollouts"]
    assert streamed["steps"] == whole["steps"]
    assert len(streamed["steps"]) == len(cols["rollout"])
    # every image went into the streamed upload's pack; the whole-file upload found them stored
    assert store_contents(engine)["images"] == images_after_stream
    digests = {s[-1] for s in streamed["steps"]} - {None}
    assert len(images_after_stream) == len(digests) > 0
    for image in {i for i in cols["image"] if i is not None}:
        served = client.get(f"/api/images/{hashlib.sha256(image).hexdigest()}", headers=admin)
        assert served.status_code == 200 and served.content == image
    assert leftovers(settings) == []


def test_a_file_read_by_column_groups_stores_what_the_whole_file_path_stores(
    client, loops, uploader, engine, settings, tmp_path, small_batches, monkeypatch
):
    """One column per feature, every column read in a group of its own (spilled to the staging
    folder and read back): the same rollouts and steps, and nothing left in the upload folder."""
    monkeypatch.setattr(stream_read, "PARQUET_READERS_BYTES", 1)
    cols = per_feature(shuffled(discrete_columns(n_rollouts=6, steps=11)))
    path = as_file(tmp_path, cols, "parquet")
    response = send(client, uploader, path.read_bytes(), path.name)
    assert response.status_code == 201, response.text
    assert response.json()["steps"] == len(cols["rollout"])
    whole_file_store(engine, settings, path, "parquet")
    streamed, whole = stored(engine, SLUG), stored(engine, OTHER)
    assert streamed["rollouts"] == whole["rollouts"]
    assert streamed["steps"] == whole["steps"] and len(whole["steps"]) == len(cols["rollout"])
    assert leftovers(settings) == []


def leftovers(settings) -> list[str]:
    """Spooled uploads or staging folders left behind in the upload folder."""
    folder = settings.upload_dir
    return sorted(p.name for p in folder.iterdir()) if folder.exists() else []


# ---- refusals in a late batch: the whole-file message, nothing stored


def late(column: str, row: int, value):
    def build() -> bytes:
        cols = discrete_rows(8, 10)
        cols[column][row] = value
        return parquet_bytes(cols)

    return build


def late_duplicate() -> bytes:
    cols = discrete_rows(8, 10)
    cols["step"][75] = cols["step"][74]
    return parquet_bytes(cols)


def unsorted_backwards() -> bytes:
    cols = discrete_rows(8, 10)
    cols["time_s"][66] = 0.0
    return parquet_bytes(shuffled(cols, seed=1))


def late_jsonl_line(line: str) -> bytes:
    lines = jsonl_bytes(discrete_rows(8, 10)).decode().splitlines()
    lines[70] = line
    return ("\n".join(lines) + "\n").encode()


def late_ensemble_members() -> bytes:
    cols = discrete_rows(8, 10)
    cols["learner_ensemble"] = [
        None if p is None else [p] * (3 if i >= 60 else 2)
        for i, p in enumerate(cols["learner_probs"])
    ]
    return parquet_bytes(cols)


def late_npz_step() -> bytes:
    cols = discrete_rows(8, 10)
    step = np.array(cols["step"])
    step[77] = -4
    return npz_bytes(
        {
            "rollout": np.array(cols["rollout"]),
            "step": step,
            "time_s": np.array(cols["time_s"]),
            "features": np.array(cols["features"], dtype=np.float32),
        }
    )


def late_image() -> bytes:
    cols = discrete_rows(8, 10)
    cols["image"] = [b"\x89PNG\r\n\x1a\n" + bytes([i]) * 40 for i in range(80)]
    cols["image"][71] = b"GIF89a" + bytes(40)
    return parquet_bytes(cols)


LATE = [
    ("bad control value", late("control", 63, "autopilot"), "parquet"),
    ("NaN time", late("time_s", 58, float("nan")), "parquet"),
    ("unknown action", late("learner_action", 79, "jump"), "parquet"),
    ("duplicate step", late_duplicate, "parquet"),
    ("time backwards, unsorted file", unsorted_backwards, "parquet"),
    ("ensemble member count changes", late_ensemble_members, "parquet"),
    ("not an image", late_image, "parquet"),
    ("negative step in .npz", late_npz_step, "npz"),
    ("bad JSON line", lambda: late_jsonl_line('{"rollout": "r7", "step": '), "jsonl"),
    (
        "text where numbers were",
        lambda: late_jsonl_line('{"rollout": "r7", "step": "seven", "time_s": 0.5}'),
        "jsonl",
    ),
]


def whole_file_message(data: bytes, kind: str, tmp_path: Path, spec) -> str:
    path = tmp_path / f"whole.{kind}"
    path.write_bytes(data)
    with pytest.raises(InvalidInput) as refused:
        validate(read_table(path, kind), spec, round_number=1)
    return str(refused.value)


@pytest.mark.parametrize("name,build,kind", LATE, ids=[c[0] for c in LATE])
def test_a_refusal_in_a_late_batch_names_the_row_and_changes_nothing(
    client, loops, uploader, engine, settings, tmp_path, small_batches, name, build, kind
):
    assert send(client, uploader, parquet_bytes(discrete_rows(1, 2, prefix="kept"))).status_code
    data = build()
    with Session(engine) as session:
        expected = whole_file_message(
            data, kind, tmp_path, spec_of(loop_and_round(session, SLUG)[0])
        )
    before = store_contents(engine)
    response = send(client, uploader, data, f"late.{kind}")
    assert response.status_code == 422, response.text
    assert response.json()["detail"] == expected
    assert expected.startswith(("row ", "line ")), expected  # the place is named
    assert store_contents(engine) == before
    assert leftovers(settings) == []


def test_a_late_dictionary_bomb_is_413_as_the_whole_file_path_refuses_it(
    client, loops, uploader, engine, settings, tmp_path, small_batches
):
    """A Parquet scene column of one long value repeated: every batch decodes within bounds,
    the file's total beyond max_array_bytes. The count named is what had been decoded when the
    limit was passed: counted a batch at a time, not a row group at a time as before."""
    n = 2000
    cols = discrete_rows(20, n // 20)
    cols["scene"] = ['{"agents": [], "frame": "' + "x" * 20 + '"}' + " " * 3000] * n
    data = parquet_bytes(cols)
    limit = 4_000_000
    settings.max_array_bytes = limit
    path = tmp_path / "bomb.parquet"
    path.write_bytes(data)
    message = (
        r"the Parquet file would expand to (\d+) bytes in memory; at most 4000000 are accepted"
    )
    with pytest.raises(TooLarge, match=message):
        read_table(path, "parquet", max_array_bytes=limit)
    before = store_contents(engine)
    response = send(client, uploader, data)
    assert response.status_code == 413, response.text
    counted = re.fullmatch(message, response.json()["detail"])
    assert counted and limit < int(counted.group(1)) <= 2000 * 3050
    assert store_contents(engine) == before
    assert leftovers(settings) == []


def test_two_uploads_at_once_one_refused_late_one_stored(
    client, loops, uploader, engine, settings, small_batches
):
    good = parquet_bytes(discrete_rows(6, 10, prefix="good"))
    bad_cols = discrete_rows(6, 10, prefix="bad")
    bad_cols["control"][55] = "autopilot"
    bad = parquet_bytes(bad_cols)
    worse_cols = discrete_rows(6, 10, prefix="worse")
    worse_cols["learner_action"][57] = "jump"
    worse = parquet_bytes(worse_cols)
    before = store_contents(engine)
    with ThreadPoolExecutor(3) as pool:
        answers = list(
            pool.map(
                lambda d: send(client, uploader, d[1], d[0]),
                [("g.parquet", good), ("b.parquet", bad), ("w.parquet", worse)],
            )
        )
    assert [a.status_code for a in answers] == [201, 422, 422], [a.text for a in answers]
    assert "row 56, column control" in answers[1].json()["detail"]
    assert "row 58, column learner_action" in answers[2].json()["detail"]
    keys = client.get(f"/api/loops/{SLUG}/rounds/1/rollouts", headers=uploader).json()
    assert sorted(r["key"] for r in keys["items"]) == [f"good{i}" for i in range(6)]
    after = store_contents(engine)
    assert len(after["steps"]) == len(before["steps"]) + 60
    assert len(after["uploads"]) == len(before["uploads"]) + 1
    assert leftovers(settings) == []


def test_a_rollout_refused_in_pass_two_leaves_the_store_as_it_was(
    client, loops, uploader, engine, settings, small_batches
):
    """The clash of a stored key with new content is found in the write transaction, after
    every row was staged: rolled back, staging folder deleted."""
    assert (
        send(client, uploader, parquet_bytes(discrete_rows(1, 5, prefix="same"))).status_code == 201
    )
    changed = discrete_rows(4, 30, prefix="same", seed=7)
    before = store_contents(engine)
    response = send(client, uploader, parquet_bytes(changed))
    assert response.status_code == 409, response.text
    assert "rollout key 'same0' is already stored with different steps" in response.json()["detail"]
    assert store_contents(engine) == before
    assert leftovers(settings) == []


# ---- memory

N_MEMORY_ROWS = 300_000
# Traced (tracemalloc: Python's and numpy's allocations) peak while ingesting the file: the
# streamed path holds a few batches' worth; the whole-file path holds every row's arrays and
# a chunk of insert rows, over twice this.
MEMORY_BOUND_BYTES = 24 * 1024 * 1024


def traced_peak(run) -> int:
    gc.collect()
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        run()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_memory_stays_bounded_for_a_file_many_batches_long(
    client, loops, uploader, engine, settings, tmp_path
):
    rng = np.random.default_rng(0)
    n = N_MEMORY_ROWS
    probs = rng.dirichlet(np.ones(3), size=n).astype(np.float32)
    probs /= probs.sum(axis=1, keepdims=True)
    step = np.arange(n) % 1000
    table = pa.table(
        {
            "rollout": pa.array([f"m{i // 1000:04d}" for i in range(n)]),
            "step": pa.array(step),
            "time_s": pa.array(step * 0.1),
            "features": pa.FixedSizeListArray.from_arrays(
                pa.array(rng.standard_normal(3 * n, dtype=np.float32)), 3
            ),
            "learner_action": pa.array(probs.argmax(axis=1)),
            "learner_probs": pa.FixedSizeListArray.from_arrays(pa.array(probs.reshape(-1)), 3),
        }
    )
    path = tmp_path / "big.parquet"
    pq.write_table(table, path, row_group_size=100_000)
    del table
    rows_bytes = n * (8 + 8 + 8 + 12 + 8 + 12)  # the decoded numeric columns alone
    settings.upload_dir.mkdir(parents=True, exist_ok=True)
    spool = settings.upload_dir / "upload-memory-test"

    def streamed() -> None:
        spool.write_bytes(path.read_bytes())  # as the router spools it, beside the staging
        with Session(engine) as session:
            loop, rnd = loop_and_round(session, SLUG)
            outcome = service.ingest_file(
                session,
                loop=loop,
                rnd=rnd,
                path=spool,
                filename="big.parquet",
                file_sha256="streamed",
                user_id=None,
                blob_dir=settings.blob_dir,
            )
        spool.unlink()
        assert outcome.n_steps == n

    def whole_file() -> None:
        whole_file_store(engine, settings, path, "parquet")

    streamed_peak = traced_peak(streamed)
    whole_peak = traced_peak(whole_file)
    print(
        f"traced peak ingesting {n} steps ({rows_bytes / 1e6:.0f} MB of numeric columns): "
        f"streamed {streamed_peak / 1e6:.1f} MB, whole file {whole_peak / 1e6:.1f} MB"
    )
    assert streamed_peak < MEMORY_BOUND_BYTES < whole_peak
    assert stored(engine, SLUG)["steps"] == stored(engine, OTHER)["steps"]


@pytest.mark.parametrize("order", ["sorted", "unsorted"])
def test_distinct_new_images_of_a_streamed_upload_are_served_byte_for_byte(
    client, loops, uploader, admin, engine, settings, small_batches, order
):
    """Every image new and distinct (fresh camera frames): the staged images become the pack;
    an unsorted file's images are staged in file order, not in the order of their steps."""
    cols = discrete_rows(5, 12)
    cols["image"] = [
        b"\x89PNG\r\n\x1a\n" + hashlib.sha256(str(i).encode()).digest() * (i % 5 + 1)
        for i in range(60)
    ]
    if order == "unsorted":
        cols = shuffled(cols, seed=4)
    response = send(client, uploader, parquet_bytes(cols))
    assert response.status_code == 201, response.text
    for image in cols["image"]:
        served = client.get(f"/api/images/{hashlib.sha256(image).hexdigest()}", headers=admin)
        assert served.status_code == 200 and served.content == image
    assert len(store_contents(engine)["images"]) == 60
    assert leftovers(settings) == []
