"""The README's tables say what the code does: settings, environment variables, rollout columns.

Each table is read as markdown (tests/docs/readme.py) and compared with the code in both
directions: everything the code has is in the README with the same default, and nothing in the
README is missing from the code.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest
from pydantic.fields import FieldInfo
from typer.main import get_command

from expertloop import db
from expertloop.cli import NEW_PASSWORD_ENV, cli
from expertloop.config import Settings
from expertloop.loops.schemas import LoopSettings
from expertloop.shared.contract import OPTIONAL_COLUMNS, REQUIRED_COLUMNS
from tests.docs.readme import README, Table, tables_with_header, unquote

NO_DEFAULT = "—"


def documents_default(field: FieldInfo, written: str) -> bool:
    """Whether the README's default cell states the field's default.

    ``on`` / ``off`` for booleans, numbers by value, paths by path, text as inline code. A field
    without a value (None) is either "—" or described in words that its description in the code
    also uses.
    """
    default = field.default
    if written == NO_DEFAULT:
        return default is None
    if default is None:
        return written.lower() in (field.description or "").lower()
    if isinstance(default, bool):
        return written == ("on" if default else "off")
    if isinstance(default, int | float):
        try:
            return float(unquote(written)) == default
        except ValueError:
            return False
    if isinstance(default, Path):
        return written.startswith("`") and Path(unquote(written)) == default
    return written == f"`{default}`"


def rows_by_name(table: Table) -> dict[str, str]:
    """Name -> default cell; a row may pair names and defaults as ``a`` / ``b`` and x / y."""
    documented: dict[str, str] = {}
    for row in table.rows:
        names = [unquote(n) for n in re.split(r"\s*[/,]\s*(?=`)", row[0])]
        defaults = [d.strip() for d in row[1].split(" / ")] if len(names) > 1 else [row[1]]
        assert len(defaults) == len(names), f"README {table.section}: {row[0]} vs {row[1]}"
        for name, default in zip(names, defaults, strict=True):
            assert name not in documented, f"README {table.section}: {name} twice"
            documented[name] = default
    return documented


def compare(documented: dict[str, str], fields: dict[str, FieldInfo]) -> list[str]:
    problems = [f"{name}: in the code, not in the README" for name in fields.keys() - documented]
    problems += [f"{name}: in the README, not in the code" for name in documented.keys() - fields]
    for name in documented.keys() & fields.keys():
        if not documents_default(fields[name], documented[name]):
            problems.append(
                f"{name}: README default {documented[name]!r}, code {fields[name].default!r}"
            )
    return problems


def test_loop_settings_table_matches_the_settings_model() -> None:
    (table,) = tables_with_header("setting")
    assert table.section == "Loops"
    problems = compare(rows_by_name(table), LoopSettings.model_fields)
    assert not problems, "README loop settings drifted:\n" + "\n".join(problems)


def cli_environment() -> dict[str, FieldInfo]:
    """Environment variables the command line reads, with their defaults."""
    found: dict[str, FieldInfo] = {NEW_PASSWORD_ENV: FieldInfo(default=None)}

    def walk(command: Any) -> None:
        for sub in getattr(command, "commands", {}).values():
            walk(sub)
        for param in getattr(command, "params", []):
            if param.envvar:
                found[param.envvar] = FieldInfo(default=param.default or None)

    walk(get_command(cli))
    return found


def test_environment_table_matches_settings_and_command_line() -> None:
    prefix = Settings.model_config["env_prefix"]
    code = {prefix + name.upper(): field for name, field in Settings.model_fields.items()}
    cli_vars = cli_environment()
    assert cli_vars.keys() & code.keys() == set()
    code |= cli_vars
    (table,) = tables_with_header("variable")  # one table: nothing to keep in step twice
    assert table.section == "Environment"
    problems = compare(rows_by_name(table), code)
    assert not problems, "README environment table drifted:\n" + "\n".join(problems)


def test_rollout_column_table_matches_the_contract() -> None:
    (table,) = tables_with_header("column")
    assert table.section == "Rollout files"
    assert table.header[:3] == ("column", "type", "required")
    # *feature name* (in italics) stands for the per-feature columns, named by the loop
    named = {unquote(row[0]): row[2] for row in table.rows if row[0].startswith("`")}
    assert any(row[0].startswith("*") for row in table.rows)
    contract = set(REQUIRED_COLUMNS) | set(OPTIONAL_COLUMNS)
    assert named.keys() - contract == set(), "in the README, not in the contract"
    assert contract - named.keys() == set(), "in the contract, not in the README"
    required = {name for name, cell in named.items() if cell == "yes"}
    assert required == set(REQUIRED_COLUMNS)


def test_readme_connection_bound_is_the_pool_of_the_code() -> None:
    # README, "Scaling": the figures are prose, read here from their one sentence.
    text = " ".join(README.read_text(encoding="utf-8").split())
    found = re.search(
        r"opens up to (\d+) connections \(a pool of (\d+) plus (\d+) overflow\), and up to "
        r"(\d+) more of its own while it reads training sets in bulk.*?"
        r"keep `max_connections` above (\d+) × app processes.*?"
        r"finds all of its process's connections busy waits up to (\d+) s for one",
        text,
    )
    assert found, "the README's connection bound sentences are gone"
    total, size, overflow, bulk, per_process, wait_s = map(int, found.groups())
    assert (size, overflow) == (db.POSTGRES_POOL_SIZE, db.POSTGRES_MAX_OVERFLOW)
    assert total == size + overflow
    assert bulk == db.POSTGRES_BULK_READERS
    assert per_process == total + bulk
    assert wait_s == db.POOL_TIMEOUT_S


@pytest.mark.parametrize(
    ("default", "written", "documented"),
    [
        (1, "1", True),
        (0.5, "0.5", True),
        (10, "`10`", True),
        (10, "11", False),
        (False, "off", True),
        (True, "off", False),
        (Path("expertloop-data"), "`./expertloop-data`", True),
        (Path("expertloop-data"), "`./data`", False),
        ("thread", "`thread`", True),
        ("thread", "`worker`", False),
        (None, "10% of each dimension's range", True),
        (None, "20% of the range", False),
        (None, "—", True),
        ("", "—", False),
    ],
)
def test_default_comparison(default: Any, written: str, documented: bool) -> None:
    field = FieldInfo(
        default=default, description="Tolerance; default 10% of each dimension's range."
    )
    assert documents_default(field, written) is documented
