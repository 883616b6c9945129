"""The image store's pieces without a server: content hashes, and pack writing (direct I/O and
its fallback through the page cache)."""

from __future__ import annotations

import errno
import hashlib
import os
from unittest import mock

import numpy as np
import pytest

from expertloop.ingest import image_store, images


def test_image_hashes_are_sha256_of_the_bytes():
    # docs/references.md, "Image store": FIPS 180-4 digests of the empty message and of "abc"
    got = images.content_digests(np.array([b"", None, b"abc"], dtype=object))
    assert got == [
        "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855",
        None,
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad",
    ]


def test_hashing_on_threads_gives_each_image_its_own_hash_in_order():
    rng = np.random.default_rng(3)
    column = np.array(
        [None if i % 7 == 0 else rng.bytes(int(rng.integers(1, 5000))) for i in range(1000)],
        dtype=object,
    )
    with (
        mock.patch.object(images, "HASH_THREADS", 3),
        mock.patch.object(images, "HASH_BYTES_PER_THREAD", 100_000),
        mock.patch.object(images, "_digests", wraps=images._digests) as part,
    ):
        got = images.content_digests(column)
    assert part.call_count == 3
    # docs/references.md, "Image store": hashlib.sha256, one image at a time
    assert got == [None if b is None else hashlib.sha256(b).hexdigest() for b in column]


def sample_images(seed: int = 0) -> list[bytes]:
    """Images around and across the staging buffer's size (3 blocks in these tests)."""
    rng = np.random.default_rng(seed)
    sizes = [1, 4095, 4096, 4097, 3 * 4096, 3 * 4096 + 1, 7 * 4096 + 5, 100, 20_000, 3]
    return [rng.bytes(n) for n in sizes]


@pytest.fixture
def small_staging():
    with (
        mock.patch.object(image_store, "STAGING_BYTES", 3 * 4096),
        mock.patch.object(image_store, "DIRECT_FROM_BYTES", 0),
    ):
        yield


def direct_io_works(folder) -> bool:
    probe = folder / "probe"
    fd = os.open(probe, os.O_WRONLY | os.O_CREAT)
    try:
        return image_store._set_direct(fd, True)
    finally:
        os.close(fd)
        probe.unlink()


def test_a_pack_holds_the_images_back_to_back(tmp_path, small_staging):
    data = sample_images()
    with mock.patch.object(
        image_store, "_write_buffered", wraps=image_store._write_buffered
    ) as buffered:
        path = image_store.write_pack(tmp_path, "ab" + "0" * 30, data)
    assert path == tmp_path / "packs" / "ab" / f"ab{'0' * 30}.pack"
    assert path.read_bytes() == b"".join(data)
    assert list(image_store.incoming_packs(tmp_path).iterdir()) == []
    if direct_io_works(tmp_path):
        assert buffered.call_count == 0  # every block went out directly
    else:  # the file system refuses direct I/O: the whole pack goes through the page cache
        assert buffered.call_count >= 1


class FakeDirect:
    """os.write as direct I/O sees it, refusing or cutting short the write numbered `at`."""

    def __init__(self, at: int, *, short: bool) -> None:
        self.at, self.short, self.calls = at, short, 0
        self.real = os.write

    def __call__(self, fd: int, data) -> int:
        self.calls += 1
        if self.calls == self.at:
            if self.short:
                return self.real(fd, bytes(data)[:4096])
            raise OSError(errno.EINVAL, "direct I/O refused")
        return self.real(fd, data)


@pytest.mark.parametrize("short", [False, True])
@pytest.mark.parametrize("at", [1, 2, 5, 7])  # 85,646 bytes: six full buffers, then the rest
def test_a_refused_or_short_direct_write_continues_through_the_page_cache(
    tmp_path, small_staging, at, short
):
    data = sample_images(seed=at)
    fake = FakeDirect(at, short=short)
    # direct mode is "on" whatever the file system says, so the fallback is what is tested
    with (
        mock.patch.object(image_store, "_set_direct", return_value=True),
        mock.patch.object(image_store.os, "write", fake),
    ):
        path = image_store.write_pack(tmp_path, "cd" + "1" * 30, data)
    assert sum(map(len, data)) == 85_646
    assert fake.calls >= at
    assert path.read_bytes() == b"".join(data)


def test_a_pack_that_cannot_be_written_leaves_nothing_behind(tmp_path):
    with (
        mock.patch.object(image_store.os, "fsync", side_effect=OSError(errno.EIO, "disk")),
        pytest.raises(OSError),
    ):
        image_store.write_pack(tmp_path, "ef" + "2" * 30, sample_images())
    assert list(image_store.incoming_packs(tmp_path).iterdir()) == []
    assert list((tmp_path / "packs").glob("*/*.pack")) == []
