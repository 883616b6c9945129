"""The repository carries its own references: citations name sections of docs/references.md.

Code, tests and documents cite an outside source as ``docs/references.md, "<section title>"``.
These tests fail when a citation names a section that does not exist, and when any file of the
repository cites notes that are not in it (the team's working notes, or a path on a machine).
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from tests.docs.repository import REPOSITORY, repository_text_files

REFERENCES = REPOSITORY / "docs" / "references.md"
CITE = "docs/references.md, "  # kept apart from titles so this file cites nothing itself

# A citation, possibly wrapped over lines of a comment: docs/references.md, "<title>".
CITATION = re.compile(r'docs/references\.md,\s*(?:#\s*)?"([A-Za-z<][^"]{0,120})"')

# Notes outside the repository. Written so that this file does not match itself.
OUTSIDE_NOTES = re.compile(
    r"\b(?:REFERENCES|DESIGN|STYLE)\.md\b"  # the team's working notes
    r"|/wor[k]/"  # the working area of the machine the project was built on
    r"|(?<![\w/.-])share[d]/"  # the shared notes folder
    r"|(?<![\w.])\.\./[\w./-]*\.(?:md|rst|txt)\b"  # a document beside the repository
)


def section_titles(markdown: str) -> list[str]:
    return [line[3:].strip() for line in markdown.splitlines() if line.startswith("## ")]


def cited_titles(text: str) -> list[str]:
    """Titles cited in text; a title wrapped over comment lines is joined with single spaces."""
    titles = []
    for match in CITATION.finditer(text):
        title = re.sub(r"\s*\n\s*(?:#\s*)?", " ", match.group(1)).strip()
        if not title.startswith("<"):  # the placeholder in the instructions themselves
            titles.append(title)
    return titles


def test_sections_have_unique_titles() -> None:
    titles = section_titles(REFERENCES.read_text(encoding="utf-8"))
    assert len(titles) >= 20
    duplicated = sorted({t for t in titles if titles.count(t) > 1})
    assert not duplicated, f"docs/references.md repeats section titles: {duplicated}"


def test_every_citation_names_an_existing_section() -> None:
    titles = set(section_titles(REFERENCES.read_text(encoding="utf-8")))
    missing, found = [], 0
    for path, text in repository_text_files():
        for title in cited_titles(text):
            found += 1
            if title not in titles:
                missing.append(f"{path.relative_to(REPOSITORY)}: {title!r}")
    assert not missing, "citations of sections docs/references.md lacks:\n" + "\n".join(missing)
    assert found >= 30  # code and tests do cite it: the scan really reads them


def test_nothing_cites_notes_outside_the_repository() -> None:
    offending = []
    for path, text in repository_text_files():
        for number, line in enumerate(text.splitlines(), start=1):
            if OUTSIDE_NOTES.search(line):
                offending.append(f"{path.relative_to(REPOSITORY)}:{number}: {line.strip()}")
    assert not offending, "cite docs/references.md instead of:\n" + "\n".join(offending)


@pytest.mark.parametrize(
    ("text", "cites_outside"),
    [
        ("# REFERENCES" + ".md section 9", True),
        ("see DESIGN" + ".md §6", True),
        ("(STYLE" + ".md invariance)", True),
        ("/wor" + "k/shared/notes", True),
        ("shared" + "/REFERENCES", True),
        ("see ../notes" + "/design.md", True),
        (f'{CITE}"kNN novelty"', False),
        ("GET .../report.csv", False),
        ("rsync -a /srv/expertloop-data/blobs/ backup-host:/backups/", False),
    ],
)
def test_outside_note_pattern(text: str, cites_outside: bool) -> None:
    assert bool(OUTSIDE_NOTES.search(text)) is cites_outside


def test_wrapped_citations_are_joined() -> None:
    wrapped = f'# Lemma 6 ({CITE}"Squared MMD with\n    # an RBF kernel") and'
    assert cited_titles(wrapped) == ["Squared MMD with an RBF kernel"]
    assert cited_titles(f'as `{CITE}"<section title>"`') == []


def test_scan_reads_code_tests_and_documents() -> None:
    seen = {path.relative_to(REPOSITORY).as_posix() for path, _ in repository_text_files()}
    for expected in ("README.md", "app/sampler/novelty.py", "tests/conftest.py", "pyproject.toml"):
        assert expected in seen
    assert not any(part.startswith(".git/") or "__pycache__" in part for part in seen)


def test_repository_root_is_this_checkout() -> None:
    assert (REPOSITORY / "pyproject.toml").is_file()
    assert Path(__file__).resolve().is_relative_to(REPOSITORY)
