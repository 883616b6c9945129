"""The files of this checkout that tests about the repository itself read."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

REPOSITORY = Path(__file__).resolve().parents[2]

# Generated or installed things that are not the project's own text.
_SKIPPED_DIRECTORIES = {
    ".git",
    "__pycache__",
    ".pytest_cache",
    ".mypy_cache",
    ".ruff_cache",
    ".venv",
    "venv",
    "node_modules",
    "build",
    "dist",
    "expertloop-data",
    "artifacts",
    "out",
}
_LARGEST_TEXT_FILE = 2 * 1024 * 1024


def repository_text_files() -> Iterator[tuple[Path, str]]:
    """Every UTF-8 text file of the checkout with its text, in path order."""
    for path in sorted(REPOSITORY.rglob("*")):
        relative = path.relative_to(REPOSITORY)
        if any(p in _SKIPPED_DIRECTORIES or p.endswith(".egg-info") for p in relative.parts):
            continue
        if not path.is_file() or path.stat().st_size > _LARGEST_TEXT_FILE:
            continue
        try:
            text = path.read_text(encoding="utf-8")
        except UnicodeDecodeError:
            continue  # binary: Parquet samples, images
        yield path, text
