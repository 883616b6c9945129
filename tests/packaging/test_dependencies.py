"""Every third-party library the application imports is declared where its users get it.

Run-time imports must be in pyproject's ``dependencies``. A library in an extra may be imported
only by the modules that extra is for (``EXTRA_ONLY``); every other module must import without
it, which a fresh interpreter with that library hidden checks.
"""

from __future__ import annotations

import ast
import json
import os
import subprocess
import sys
import tomllib
from importlib.metadata import packages_distributions
from pathlib import Path

import pytest
from packaging.requirements import Requirement
from packaging.utils import canonicalize_name

from tests.docs.repository import REPOSITORY
from tests.packaging.hidden import hide

PYPROJECT = REPOSITORY / "pyproject.toml"
APP = REPOSITORY / "app"

# extra -> (the import names it provides, the modules that alone may import them). The demo
# learner of `expertloop demo-run` trains with scikit-learn; `serve --demo` does not need it.
EXTRA_ONLY = {"demo": ({"sklearn"}, {"expertloop.demo.learner", "expertloop.demo.loop_run"})}

IMPORT_EVERY_MODULE = """
import importlib, json, pkgutil
import expertloop

failed = {}
for info in pkgutil.walk_packages(expertloop.__path__, "expertloop."):
    try:
        importlib.import_module(info.name)
    except ModuleNotFoundError as exc:
        failed[info.name] = exc.name
print(json.dumps(failed))
"""


def declared() -> tuple[set[str], dict[str, set[str]]]:
    """Run-time distributions, and each extra's, by canonical name."""
    project = tomllib.loads(PYPROJECT.read_text(encoding="utf-8"))["project"]

    def names(requirements: list[str]) -> set[str]:
        return {canonicalize_name(Requirement(r).name) for r in requirements}

    extras = {name: names(reqs) for name, reqs in project["optional-dependencies"].items()}
    return names(project["dependencies"]), extras


def module_name(path: Path) -> str:
    parts = ("expertloop", *path.relative_to(APP).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def third_party_imports() -> dict[str, set[str]]:
    """Import name -> the app modules importing it, at any depth (lazy imports included)."""
    found: dict[str, set[str]] = {}
    for path in sorted(APP.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                tops = [alias.name.split(".")[0] for alias in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                tops = [node.module.split(".")[0]]
            else:
                continue
            for top in tops:
                if top != "expertloop" and top not in sys.stdlib_module_names:
                    found.setdefault(top, set()).add(module_name(path))
    return found


def import_every_module(hidden: Path | None) -> dict[str, str]:
    """Modules that fail to import in a fresh interpreter, with the missing module's name."""
    paths = [str(hidden)] if hidden else []
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([*paths, str(REPOSITORY)])}
    done = subprocess.run(
        [sys.executable, "-c", IMPORT_EVERY_MODULE],
        cwd=REPOSITORY,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
        check=True,
    )
    return json.loads(done.stdout.strip().splitlines()[-1])  # type: ignore[no-any-return]


def test_every_third_party_import_is_declared() -> None:
    runtime, extras = declared()
    distributions = packages_distributions()
    problems = []
    for top, importers in sorted(third_party_imports().items()):
        names = {canonicalize_name(d) for d in distributions.get(top, [])}
        assert names, f"{top}: imported by {sorted(importers)} but not installed"
        if names & runtime:
            continue
        allowed = [
            extra
            for extra, (tops, modules) in EXTRA_ONLY.items()
            if top in tops and importers <= modules and names & extras[extra]
        ]
        if not allowed:
            problems.append(f"{top} ({', '.join(sorted(names))}): {sorted(importers)}")
    assert not problems, "declare these in pyproject's dependencies:\n" + "\n".join(problems)


def test_extra_only_libraries_are_not_run_time_dependencies() -> None:
    runtime, extras = declared()
    distributions = packages_distributions()
    for extra, (tops, _) in EXTRA_ONLY.items():
        for top in tops:
            names = {canonicalize_name(d) for d in distributions[top]}
            assert names & extras[extra] and not names & runtime


@pytest.mark.slow
def test_every_module_imports_in_a_fresh_interpreter() -> None:
    assert import_every_module(None) == {}


@pytest.mark.slow
def test_only_the_extras_modules_need_the_extra(tmp_path: Path) -> None:
    for extra, (tops, modules) in EXTRA_ONLY.items():
        for top in tops:
            failed = import_every_module(hide(tmp_path / extra, top))
            assert failed == dict.fromkeys(modules, top), extra
