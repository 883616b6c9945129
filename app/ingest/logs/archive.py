"""Which robot-log format an upload is, and ROS 2 bag folders sent as .zip or .tar unpacked
safely into the spool folder (size and member limits; no absolute paths, no `..`, no links)."""

from __future__ import annotations

import shutil
import stat
import tarfile
import zipfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path, PurePosixPath
from typing import IO

from ...errors import InvalidInput, TooLarge

# format names stored with an upload (at most 16 characters)
BAG_FORMATS = ("mcap", "ros2-sqlite", "ros1-bag", "ros2-zip", "ros2-tar")
_SUFFIXES = {
    ".mcap": "mcap",
    ".db3": "ros2-sqlite",
    ".bag": "ros1-bag",
    ".zip": "ros2-zip",
    ".tar": "ros2-tar",
    ".tar.gz": "ros2-tar",
    ".tgz": "ros2-tar",
    ".tar.xz": "ros2-tar",
    ".tar.bz2": "ros2-tar",
}
_MAGIC = ((b"\x89MCAP", "mcap"), (b"#ROSBAG", "ros1-bag"), (b"SQLite format 3\x00", "ros2-sqlite"))
MAX_MEMBERS = 10_000
DEFAULT_MAX_UNPACKED_BYTES = 4 * 1024**3
COPY_CHUNK = 1024 * 1024
# what a bag is read through in the spool folder (a link or an unpacked folder); servers sweep
# day-old ones left by a crash (app/ingest/spool.py)
SPOOL_PREFIX = "bag-"


def bag_format(path: Path, filename: str) -> str | None:
    """The robot-log format of an upload from its name or first bytes; None if it is none."""
    lower = filename.lower()
    for suffix in sorted(_SUFFIXES, key=len, reverse=True):
        if lower.endswith(suffix):
            return _SUFFIXES[suffix]
    with path.open("rb") as fh:
        head = fh.read(512)
    for magic, name in _MAGIC:
        if head.startswith(magic):
            return name
    if head[257:262] == b"ustar":
        return "ros2-tar"
    return None


def log_stem(filename: str) -> str:
    """The upload's name without folder and log suffix: the rollout keys' stem."""
    name = PurePosixPath(filename.replace("\\", "/")).name
    lower = name.lower()
    for suffix in sorted(_SUFFIXES, key=len, reverse=True):
        if lower.endswith(suffix):
            return name[: -len(suffix)] or "log"
    return name or "log"


@contextmanager
def bag_path(path: Path, file_format: str, spool_dir: Path, max_bytes: int) -> Iterator[Path]:
    """The path the bag reader opens: the file itself, or the bag unpacked from an archive (a
    folder with metadata.yaml, or its one .mcap/.db3 file), removed again on exit."""
    if file_format not in ("ros2-zip", "ros2-tar"):
        # rosbags picks the storage by suffix; the spooled file has none
        suffix = {"mcap": ".mcap", "ros2-sqlite": ".db3", "ros1-bag": ".bag"}[file_format]
        spool_dir.mkdir(parents=True, exist_ok=True)
        link = spool_dir / f"{SPOOL_PREFIX}{path.name}{suffix}"
        link.symlink_to(path.resolve())
        try:
            yield link
        finally:
            link.unlink(missing_ok=True)
        return
    spool_dir.mkdir(parents=True, exist_ok=True)
    folder = spool_dir / f"{SPOOL_PREFIX}{path.name}.d"
    folder.mkdir()
    try:
        if file_format == "ros2-zip":
            _unzip(path, folder, max_bytes)
        else:
            _untar(path, folder, max_bytes)
        yield _find_bag(folder)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def _safe_name(name: str) -> PurePosixPath:
    """A member name as a relative path inside the target; refuse anything that could leave it."""
    pure = PurePosixPath(name.replace("\\", "/"))
    if pure.is_absolute() or (pure.parts and pure.parts[0].endswith(":")):
        raise InvalidInput(f"archive member '{name}' has an absolute path; refused")
    if any(part == ".." for part in pure.parts):
        raise InvalidInput(f"archive member '{name}' points outside the archive ('..'); refused")
    return pure


class _Budget:
    """Counts bytes written across all members and refuses past the limit."""

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self.used = 0

    def copy(self, source: IO[bytes], target: Path) -> None:
        target.parent.mkdir(parents=True, exist_ok=True)
        with target.open("wb") as out:
            while chunk := source.read(COPY_CHUNK):
                self.used += len(chunk)
                if self.used > self.limit:
                    raise TooLarge(
                        f"the unpacked bag is larger than the limit of {self.limit} bytes"
                    )
                out.write(chunk)


def _unzip(path: Path, folder: Path, limit: int) -> None:
    budget = _Budget(limit)
    try:
        with zipfile.ZipFile(path) as archive:
            members = archive.infolist()
            _check_count(len(members))
            for info in members:
                relative = _safe_name(info.filename)
                mode = info.external_attr >> 16
                if stat.S_ISLNK(mode):
                    raise InvalidInput(f"archive member '{info.filename}' is a link; refused")
                if info.is_dir():
                    continue
                with archive.open(info) as source:
                    budget.copy(source, folder / relative)
    except (zipfile.BadZipFile, EOFError, OSError) as exc:
        raise InvalidInput(f"not a readable .zip archive (truncated or damaged?): {exc}") from exc


def _untar(path: Path, folder: Path, limit: int) -> None:
    budget = _Budget(limit)
    try:
        with tarfile.open(path, mode="r:*") as archive:
            count = 0
            for member in archive:
                count += 1
                _check_count(count)
                relative = _safe_name(member.name)
                if member.isdir():
                    continue
                if not member.isfile():
                    raise InvalidInput(
                        f"archive member '{member.name}' is not a plain file or folder; refused"
                    )
                source = archive.extractfile(member)
                assert source is not None  # a regular file always has a reader
                with source:
                    budget.copy(source, folder / relative)
    except (tarfile.TarError, EOFError, OSError) as exc:
        raise InvalidInput(f"not a readable .tar archive (truncated or damaged?): {exc}") from exc


def _check_count(count: int) -> None:
    if count > MAX_MEMBERS:
        raise InvalidInput(f"the archive holds more than {MAX_MEMBERS} members; refused")


def _find_bag(folder: Path) -> Path:
    metadata = sorted(folder.rglob("metadata.yaml"))
    if len(metadata) == 1:
        return metadata[0].parent
    if len(metadata) > 1:
        raise InvalidInput("the archive holds more than one ROS 2 bag (metadata.yaml); send one")
    storage = sorted([*folder.rglob("*.mcap"), *folder.rglob("*.db3")])
    if len(storage) == 1:
        return storage[0]
    raise InvalidInput(
        "the archive holds no ROS 2 bag: expected one folder with metadata.yaml, "
        "or a single .mcap or .db3 file"
    )
