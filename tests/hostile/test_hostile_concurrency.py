"""Uploads at the same moment: a file being validated holds nothing other writers need, and the
same file sent twice at once is stored once, both senders getting the documented answer."""

from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor
from unittest import mock

from expertloop.ingest import service as ingest_service
from expertloop.ingest import staging
from tests.helpers import discrete_rows, parquet_bytes
from tests.hostile.conftest import row_counts

URL = "/api/loops/aisle-crossing/rounds/1/rollouts"


def post(client, headers, data: bytes, name: str = "a.parquet"):
    return client.post(URL, files={"file": (name, data)}, headers=headers)


def test_the_same_file_twice_at_once_is_stored_once(client, loops, uploader, engine):
    data = parquet_bytes(discrete_rows(2, 5))
    both_validated = threading.Barrier(2, timeout=20)
    real = ingest_service.rollout_hashes

    def after_both_validated(batch):
        both_validated.wait()  # both have passed the early repeat check before either stores
        return real(batch)

    before = row_counts(engine)
    with (
        mock.patch.object(ingest_service, "rollout_hashes", after_both_validated),
        ThreadPoolExecutor(2) as pool,
    ):
        answers = list(pool.map(lambda _: post(client, uploader, data), range(2)))
    assert [a.status_code for a in answers] == [201, 201], [a.text for a in answers]
    bodies = [a.json() for a in answers]
    assert sorted(b["duplicate_file"] for b in bodies) == [False, True]
    assert bodies[0]["rollouts"] == bodies[1]["rollouts"]
    after = row_counts(engine)
    assert after["uploads"] == before["uploads"] + 1
    assert after["rollouts"] == before["rollouts"] + 2 and after["steps"] == before["steps"] + 10


def test_a_file_being_validated_blocks_no_other_upload(client, loops, uploader, engine):
    slow = parquet_bytes(discrete_rows(1, 5, prefix="slow"))
    quick = parquet_bytes(discrete_rows(1, 5, prefix="quick"))
    validating, release = threading.Event(), threading.Event()
    real = staging.validate_rows  # each table of a file read in batches is validated here

    def held_validate(table, *args, **kwargs):
        if "slow0" in table["rollout"].to_pylist():
            validating.set()
            release.wait(20)  # a very slow parse: nothing may wait for it
        return real(table, *args, **kwargs)

    with (
        mock.patch.object(staging, "validate_rows", held_validate),
        ThreadPoolExecutor(1) as pool,
    ):
        slow_answer = pool.submit(post, client, uploader, slow)
        assert validating.wait(20)
        try:
            assert client.get("/healthz").status_code == 200
            assert post(client, uploader, quick).status_code == 201
            assert not slow_answer.done(), "the quick upload waited for the slow one"
        finally:
            release.set()
        assert slow_answer.result().status_code == 201
    keys = client.get("/api/loops/aisle-crossing/rounds/1/rollouts", headers=uploader).json()
    assert sorted(r["key"] for r in keys["items"]) == ["quick0", "slow0"]
