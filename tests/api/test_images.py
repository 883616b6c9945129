"""Camera images stored in bulk: one pack per upload, an index row per image, read back by range.

Every check runs on the backend the suite runs on (EXPERTLOOP_TEST_DATABASE_URL for PostgreSQL):
bytes read back equal bytes sent, an image is stored once within an upload, across uploads and
across uploads at the same moment, single files stored by earlier versions are still served, and
a refused or failed upload leaves no row, no pack and no image to serve.
"""

from __future__ import annotations

import errno
import hashlib
import os
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from unittest import mock

import pytest
from sqlalchemy import text
from sqlalchemy.exc import OperationalError

from expertloop.ingest import image_store
from expertloop.ingest import service as ingest_service
from expertloop.main import create_app
from tests.conftest import PG_URL, store_contents
from tests.helpers import DISCRETE_SPEC, discrete_rows, parquet_bytes

SLUG = DISCRETE_SPEC["slug"]
URL = f"/api/loops/{SLUG}/rounds/1/rollouts"
PNG = b"\x89PNG\r\n\x1a\n"
JPEG = b"\xff\xd8\xff\xe0"
WEBP_HEAD = b"RIFF\x10\x00\x00\x00WEBPVP8 "


def png(tag: str, size: int = 300) -> bytes:
    """A distinct PNG-signed image of `size` bytes."""
    body = hashlib.sha256(tag.encode()).digest() * (size // 32 + 1)
    return (PNG + body)[:size]


def jpeg(tag: str) -> bytes:
    return JPEG + tag.encode() * 40


def webp(tag: str) -> bytes:
    return WEBP_HEAD + tag.encode() * 20


def sha(image: bytes) -> str:
    return hashlib.sha256(image).hexdigest()


@pytest.fixture
def loop(client, admin):
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    opened = client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin)
    assert opened.status_code == 201, opened.text
    return SLUG


def file_with(images: list[bytes | None], *, prefix: str = "r", steps: int = 4) -> bytes:
    """A Parquet file of len(images) / steps rollouts carrying these images in step order."""
    assert len(images) % steps == 0
    columns = discrete_rows(len(images) // steps, steps, prefix=prefix)
    columns["image"] = images
    return parquet_bytes(columns)


def send(client, headers, data: bytes, name: str = "a.parquet"):
    return client.post(URL, files={"file": (name, data)}, headers=headers)


def packs(settings) -> list:
    return sorted((settings.blob_dir / image_store.PACK_FOLDER).glob("*/*.pack"))


def placed_packs(settings) -> list:
    """Packs in place (not being written)."""
    return [p for p in packs(settings) if p.parent.name != image_store.INCOMING]


def single_files(settings) -> list:
    """Images stored one file each, as versions before packs did."""
    root = settings.blob_dir
    if not root.exists():
        return []
    return [p for p in root.glob("*/*") if p.is_file() and p.parent.name != image_store.PACK_FOLDER]


def index_rows(engine) -> dict[str, tuple[str, int, int]]:
    with engine.connect() as conn:
        rows = conn.execute(text("SELECT sha256, pack, byte_offset, byte_length FROM images"))
        return {r[0]: (r[1], r[2], r[3]) for r in rows}


def served(client, headers, image: bytes):
    response = client.get(f"/api/images/{sha(image)}", headers=headers)
    assert response.status_code == 200, response.text
    assert response.content == image
    assert response.headers["x-content-type-options"] == "nosniff"
    return response


def test_an_uploads_images_go_into_one_pack_and_come_back_byte_for_byte(
    client, loop, uploader, admin, engine, settings
):
    images = [png("a"), jpeg("b"), None, webp("c"), png("d", 5000), None, jpeg("e"), png("f")]
    response = send(client, uploader, file_with(images))
    assert response.status_code == 201, response.text

    distinct = [i for i in images if i is not None]
    [pack] = placed_packs(settings)
    assert pack.stat().st_size == sum(len(i) for i in distinct)
    assert single_files(settings) == []
    rows = index_rows(engine)
    assert set(rows) == {sha(i) for i in distinct}
    # back to back, in step order, and each row names its own range of the pack
    content = pack.read_bytes()
    assert content == b"".join(distinct)
    for image in distinct:
        name, offset, length = rows[sha(image)]
        assert pack.name == f"{name}.pack"
        assert content[offset : offset + length] == image

    kinds = {png("a"): "image/png", jpeg("b"): "image/jpeg", webp("c"): "image/webp"}
    for image, kind in kinds.items():
        assert served(client, admin, image).headers["content-type"] == kind
    for image in distinct:
        served(client, admin, image)
    steps = client.get(f"/api/loops/{SLUG}/rollouts/r0/steps", headers=admin).json()["items"]
    assert [s["image_sha256"] for s in steps] == [None if i is None else sha(i) for i in images[:4]]


def test_an_upload_of_new_distinct_images_links_its_staged_file_as_the_pack(
    client, loop, uploader, admin, engine, settings, monkeypatch
):
    """The usual camera upload: the images staged in pass 1 already lie back to back, so the
    staged file becomes the pack and nothing is copied (a copy would fail here)."""

    def no_copy(*args, **kwargs):
        raise AssertionError("the images were copied into a new pack")

    monkeypatch.setattr(image_store, "write_pack", no_copy)
    images = [png("a"), jpeg("b"), None, webp("c"), png("d", 5000), None, jpeg("e"), png("f")]
    assert send(client, uploader, file_with(images)).status_code == 201
    [pack] = placed_packs(settings)
    distinct = [i for i in images if i is not None]
    assert pack.read_bytes() == b"".join(distinct)
    assert pack.stat().st_nlink == 1  # the staging folder, and its name for the file, are gone
    for image in distinct:
        served(client, admin, image)


def test_images_are_copied_back_to_back_when_the_staged_file_cannot_be_linked(
    client, loop, uploader, admin, engine, settings, monkeypatch
):
    """Staging on another file system than the packs: the link is refused (EXDEV), the images
    are copied in step order, and the index rows, planned at their staged places (file order,
    here the reverse of step order), move to where the copy put them."""

    def refuse(*args, **kwargs):
        raise OSError(errno.EXDEV, "Invalid cross-device link")

    monkeypatch.setattr(image_store.os, "link", refuse)
    images = [png("a"), png("b", 900), None, jpeg("c"), png("d"), webp("e"), png("f", 50), None]
    columns = discrete_rows(2, 4)
    columns["image"] = images
    reversed_rows = {name: values[::-1] for name, values in columns.items()}
    assert send(client, uploader, parquet_bytes(reversed_rows)).status_code == 201
    [pack] = placed_packs(settings)
    distinct = [i for i in images if i is not None]
    assert pack.read_bytes() == b"".join(distinct)  # step order, not the file's order
    rows = index_rows(engine)
    for image in distinct:
        _, offset, length = rows[sha(image)]
        assert pack.read_bytes()[offset : offset + length] == image
        served(client, admin, image)


def test_an_image_repeated_within_an_upload_is_stored_once(
    client, loop, uploader, admin, engine, settings
):
    same = png("same", 2000)
    images = [same, same, png("other"), same, None, same, same, png("other")]
    assert send(client, uploader, file_with(images)).status_code == 201
    [pack] = placed_packs(settings)
    assert pack.stat().st_size == len(same) + len(png("other"))
    assert set(index_rows(engine)) == {sha(same), sha(png("other"))}
    served(client, admin, same)
    served(client, admin, png("other"))


def test_images_stored_by_an_earlier_upload_are_not_written_again(
    client, loop, uploader, admin, engine, settings
):
    first = [png("a"), png("b", 700), png("c"), None]
    assert send(client, uploader, file_with(first, prefix="x")).status_code == 201
    before = index_rows(engine)
    [first_pack] = placed_packs(settings)

    # the stored images come first, so the new ones' places close the gaps they leave
    second = [png("b", 700), png("a"), png("new", 900), jpeg("newer")]
    assert send(client, uploader, file_with(second, prefix="y")).status_code == 201
    after = index_rows(engine)
    assert {k: v for k, v in after.items() if k in before} == before
    [second_pack] = [p for p in placed_packs(settings) if p != first_pack]
    assert second_pack.read_bytes() == png("new", 900) + jpeg("newer")
    assert after[sha(png("new", 900))][1:] == (0, 900)
    for image in {*first, *second} - {None}:
        served(client, admin, image)

    # a third upload with nothing new writes no pack at all
    third = [png("a"), png("b", 700), png("new", 900), None]
    assert send(client, uploader, file_with(third, prefix="z")).status_code == 201
    assert len(placed_packs(settings)) == 2
    assert index_rows(engine) == after


def test_the_same_file_twice_at_once_stores_its_images_once(
    client, loop, uploader, admin, engine, settings
):
    images = [png(f"twice-{i}") for i in range(8)]
    data = file_with(images)
    both_validated = threading.Barrier(2, timeout=20)
    real = ingest_service.rollout_hashes

    def after_both_validated(batch):
        both_validated.wait()  # both passed the early repeat check before either stores
        return real(batch)

    with (
        mock.patch.object(ingest_service, "rollout_hashes", after_both_validated),
        ThreadPoolExecutor(2) as pool,
    ):
        answers = list(pool.map(lambda _: send(client, uploader, data), range(2)))
    assert [a.status_code for a in answers] == [201, 201], [a.text for a in answers]
    assert sorted(a.json()["duplicate_file"] for a in answers) == [False, True]
    assert answers[0].json()["rollouts"] == answers[1].json()["rollouts"]
    [pack] = placed_packs(settings)
    assert pack.read_bytes() == b"".join(images)
    assert set(index_rows(engine)) == {sha(i) for i in images}
    for image in images:
        served(client, admin, image)


def test_files_sharing_images_sent_at_once_store_each_image_once(
    client, loop, uploader, admin, engine, settings
):
    shared = [png(f"shared-{i}", 400 + i) for i in range(6)]
    own = {side: [png(f"{side}-{i}", 300 + i) for i in range(2)] for side in "ab"}
    files = {
        "a": file_with([*own["a"][:1], *shared, *own["a"][1:]], prefix="a"),
        "b": file_with([*shared[::-1], *own["b"]], prefix="b"),
    }
    claiming = threading.Barrier(2, timeout=20)
    real = image_store._claim

    def both_in_flight(session, **kwargs):
        # PostgreSQL: both uploads are inside their transactions, neither committed, before
        # either indexes its images; SQLite lets one writer in at a time, so there is no race
        if PG_URL:
            claiming.wait()
        return real(session, **kwargs)

    with (
        mock.patch.object(image_store, "_claim", both_in_flight),
        ThreadPoolExecutor(2) as pool,
    ):
        answers = list(pool.map(lambda side: send(client, uploader, files[side]), "ab"))
    assert [a.status_code for a in answers] == [201, 201], [a.text for a in answers]
    assert [a.json()["duplicate_file"] for a in answers] == [False, False]
    everything = [*shared, *own["a"], *own["b"]]
    assert sum(p.stat().st_size for p in placed_packs(settings)) == sum(map(len, everything))
    assert set(index_rows(engine)) == {sha(i) for i in everything}
    for image in everything:
        served(client, admin, image)


def test_images_stored_as_single_files_by_earlier_versions_are_still_served(
    client, loop, admin, settings, engine
):
    old = png("stored-before-packs", 1200)
    path = settings.blob_dir / sha(old)[:2] / sha(old)
    path.parent.mkdir(parents=True)
    path.write_bytes(old)
    assert index_rows(engine) == {}
    response = served(client, admin, old)
    assert response.headers["content-type"] == "image/png"
    assert "content-disposition" not in response.headers


def test_a_refused_upload_leaves_no_rows_no_pack_and_no_image(
    client, loop, uploader, admin, engine, settings
):
    good = png("good")
    images = [good, png("fine"), b"<html>not an image</html>", None]
    before = store_contents(engine)
    response = send(client, uploader, file_with(images))
    assert response.status_code == 422, response.text
    assert "not a PNG, JPEG or WebP image" in response.json()["detail"]
    assert store_contents(engine) == before
    assert packs(settings) == [] and single_files(settings) == []
    assert client.get(f"/api/images/{sha(good)}", headers=admin).status_code == 404


@contextmanager
def failing_commit(real, error):
    """write_transaction whose commit fails: the block runs, then it rolls back and raises."""

    @contextmanager
    def framed(session):
        with real(session):
            yield
            raise error

    with mock.patch.object(ingest_service, "write_transaction", framed):
        yield


def test_an_upload_whose_commit_fails_leaves_no_rows_and_no_pack(
    app, loop, uploader, admin, engine, settings
):
    from fastapi.testclient import TestClient

    images = [png("lost-1"), png("lost-2"), None, png("lost-3")]
    before = store_contents(engine)
    with (
        TestClient(app, raise_server_exceptions=False) as client,
        failing_commit(ingest_service.write_transaction, RuntimeError("disk went away")),
    ):
        response = send(client, uploader, file_with(images))
        assert response.status_code == 500
        assert store_contents(engine) == before
        assert packs(settings) == []
        assert client.get(f"/api/images/{sha(images[0])}", headers=admin).status_code == 404


def test_a_commit_with_an_unknown_outcome_keeps_its_pack_unread(
    client, loop, uploader, admin, engine, settings
):
    # The store went away during the commit: the rows may have been committed, so the pack stays;
    # here they were not, and a pack no row names is never read (app/ingest/image_store.py).
    images = [png("kept-1"), png("kept-2"), None, None]
    gone = OperationalError("COMMIT", {}, Exception("server closed the connection"))
    with failing_commit(ingest_service.write_transaction, gone):
        response = send(client, uploader, file_with(images))
    assert response.status_code == 503, response.text
    assert index_rows(engine) == {}
    [pack] = placed_packs(settings)
    assert pack.read_bytes() == b"".join(images[:2])
    assert client.get(f"/api/images/{sha(images[0])}", headers=admin).status_code == 404


def test_the_image_endpoint_answers_404_for_what_it_does_not_hold(
    client, loop, uploader, admin, settings
):
    image = png("held")
    assert send(client, uploader, file_with([image, None, None, None])).status_code == 201
    digest = sha(image)
    for wrong in (digest.upper(), digest[:-1], digest + "0", "." * 64, sha(b"other")):
        response = client.get(f"/api/images/{wrong}", headers=admin)
        assert response.status_code == 404, wrong
        assert response.json()["detail"] == "no such image"
    # a pack lost from the blob folder is a missing image, not a server error
    [pack] = placed_packs(settings)
    pack.unlink()
    response = client.get(f"/api/images/{digest}", headers=admin)
    assert response.status_code == 404 and response.json()["detail"] == "no such image"


def test_a_cut_short_pack_is_a_missing_image(client, loop, uploader, admin, settings):
    images = [png("whole"), png("cut", 900), None, None]
    assert send(client, uploader, file_with(images)).status_code == 201
    [pack] = placed_packs(settings)
    os.truncate(pack, len(images[0]) + 100)
    served(client, admin, images[0])
    assert client.get(f"/api/images/{sha(images[1])}", headers=admin).status_code == 404


def test_packs_left_half_written_are_swept_at_start(settings):
    incoming = image_store.incoming_packs(settings.blob_dir)
    incoming.mkdir(parents=True)
    stale, fresh = incoming / "dead.pack", incoming / "in-flight.pack"
    stale.write_bytes(b"x")
    fresh.write_bytes(b"y")
    day_ago = time.time() - 2 * 24 * 3600
    os.utime(stale, (day_ago, day_ago))
    from fastapi.testclient import TestClient

    with TestClient(create_app(settings)):
        pass
    assert not stale.exists() and fresh.exists()


def test_robot_log_frames_go_into_a_pack(client, admin, uploader, engine, settings, tmp_path):
    from tests.logs.bags import MAPPING, build

    made = client.post("/api/loops", json={**DISCRETE_SPEC, "log_mapping": MAPPING}, headers=admin)
    assert made.status_code == 201, made.text
    client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin)
    path, written = build(tmp_path, "mcap")
    response = send(client, uploader, path.read_bytes(), path.name)
    assert response.status_code == 201, response.text
    frames = written.values["/camera/compressed"]
    rows = index_rows(engine)
    stored = [f for f in frames if sha(f) in rows]
    assert stored, "no frame of the log was stored"
    assert single_files(settings) == []
    [pack] = placed_packs(settings)
    assert pack.stat().st_size == sum(len(f) for f in {sha(f): f for f in stored}.values())
    for frame in stored:
        served(client, admin, frame)
