"""The README read as markdown (markdown-it-py): its tables and code blocks, by section."""

from __future__ import annotations

from dataclasses import dataclass
from functools import cache

from markdown_it import MarkdownIt

from tests.docs.repository import REPOSITORY

README = REPOSITORY / "README.md"


@dataclass(frozen=True)
class Table:
    section: str  # the nearest heading above the table
    header: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]  # cells as written, inline markdown kept


@dataclass(frozen=True)
class CodeBlock:
    section: str
    info: str  # the fence's language, "" when none
    text: str


@cache
def _tokens() -> list:  # type: ignore[type-arg]
    return MarkdownIt("commonmark").enable("table").parse(README.read_text(encoding="utf-8"))


def tables() -> list[Table]:
    found: list[Table] = []
    section, header, rows, row, in_head = "", (), [], [], False
    tokens = _tokens()
    for i, token in enumerate(tokens):
        if token.type == "heading_open":
            section = tokens[i + 1].content
        elif token.type == "thead_open":
            in_head = True
        elif token.type == "thead_close":
            in_head = False
        elif token.type == "tr_open":
            row = []
        elif token.type == "inline" and tokens[i - 1].type in ("th_open", "td_open"):
            row.append(token.content.strip())
        elif token.type == "tr_close":
            if in_head:
                header = tuple(row)
            else:
                rows.append(tuple(row))
        elif token.type == "table_close":
            found.append(Table(section, header, tuple(rows)))
            rows = []
    return found


def code_blocks() -> list[CodeBlock]:
    blocks: list[CodeBlock] = []
    section = ""
    tokens = _tokens()
    for i, token in enumerate(tokens):
        if token.type == "heading_open":
            section = tokens[i + 1].content
        elif token.type in ("fence", "code_block"):
            blocks.append(CodeBlock(section, token.info.strip(), token.content))
    return blocks


def inline_code() -> list[str]:
    """Every inline code span of the README (prose and tables)."""
    return [
        child.content
        for token in _tokens()
        if token.type == "inline"
        for child in token.children or []
        if child.type == "code_inline"
    ]


def tables_with_header(first_column: str) -> list[Table]:
    return [t for t in tables() if t.header and t.header[0] == first_column]


def unquote(cell: str) -> str:
    """A cell's text without the backticks of inline code."""
    return cell.strip().strip("`").strip()
