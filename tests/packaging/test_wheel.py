"""The package installs like any other: a wheel built from this tree, installed into a fresh
virtual environment outside the tree, migrates a fresh SQLite store and serves the sign-in page.

And nothing imports the source folder by its name `app`: the package is `expertloop`, and a
second name would load every module twice (two engines, two table registries).
"""

from __future__ import annotations

import ast
import os
import shutil
import subprocess
import sys
import tomllib
import venv
import zipfile
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from expertloop.demo.local_server import free_port
from tests.serving import stop, wait_until_healthy

REPOSITORY = Path(__file__).resolve().parents[2]
APP = REPOSITORY / "app"
SHIPPED = ("templates", "static", "migrations", "demo_data")
START_SECONDS = 120


def test_every_source_package_is_listed_in_pyproject() -> None:
    setuptools = tomllib.loads((REPOSITORY / "pyproject.toml").read_text())["tool"]["setuptools"]
    in_tree = {
        ".".join(("expertloop", *init.parent.relative_to(APP).parts))
        for init in APP.rglob("__init__.py")
    }
    assert set(setuptools["packages"]) == in_tree | {f"expertloop.{name}" for name in SHIPPED}
    assert setuptools["package-dir"] == {
        "expertloop": "app",
        **{f"expertloop.{name}": name for name in SHIPPED},
    }


def _absolute_app_imports(path: Path) -> list[str]:
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names = [node.module]
        else:
            continue
        found += [f"{path.relative_to(REPOSITORY)}: {n}" for n in names if n.split(".")[0] == "app"]
    return found


def test_nothing_imports_the_source_folder_by_name() -> None:
    found = [
        hit
        for folder in ("app", "tests", "bench", "demo_data", "migrations")
        for path in sorted((REPOSITORY / folder).rglob("*.py"))
        for hit in _absolute_app_imports(path)
    ]
    assert found == []


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A wheel built from a copy of the tree (the build leaves its own folders behind)."""
    source = tmp_path_factory.mktemp("source")
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(REPOSITORY / name, source / name)
    for name in ("app", *SHIPPED):
        shutil.copytree(
            REPOSITORY / name, source / name, ignore=shutil.ignore_patterns("__pycache__")
        )
    out = tmp_path_factory.mktemp("wheel")
    subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-w", out, "."],
        cwd=source,
        check=True,
        capture_output=True,
        timeout=600,
    )
    (built,) = out.glob("expertloop-*.whl")
    return built


def test_the_wheel_carries_the_package_and_its_files_and_no_app_folder(wheel: Path) -> None:
    names = set(zipfile.ZipFile(wheel).namelist())
    for shipped in (
        "expertloop/client.py",
        "expertloop/templates/login.html",
        "expertloop/static/expertloop.css",
        "expertloop/migrations/env.py",
        "expertloop/migrations/script.py.mako",
        "expertloop/demo_data/tow_tractor_discrete.json",
        "expertloop/demo_data/round0_demonstrations.parquet",
    ):
        assert shipped in names
    versions = [n for n in names if n.startswith("expertloop/migrations/versions/")]
    assert len(versions) == len(list((REPOSITORY / "migrations" / "versions").glob("*.py")))
    assert not [n for n in names if n.split("/")[0] in ("app", *SHIPPED)]


@pytest.fixture(scope="module")
def installed(wheel: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A fresh virtual environment with the wheel; its dependencies come from this interpreter's
    site-packages (no network), the package itself only from the wheel."""
    env_dir = tmp_path_factory.mktemp("venv")
    venv.EnvBuilder(system_site_packages=True, with_pip=True).create(env_dir)
    python = env_dir / "bin" / "python"
    subprocess.run(
        [python, "-m", "pip", "install", "--no-deps", "--no-index", "-q", wheel],
        check=True,
        capture_output=True,
        timeout=600,
    )
    return env_dir


def _environment(folder: Path) -> dict[str, str]:
    keep = {k: v for k, v in os.environ.items() if not k.startswith(("EXPERTLOOP_", "PYTHON"))}
    return {
        **keep,
        "EXPERTLOOP_DATABASE_URL": f"sqlite:///{folder / 'store.db'}",
        "EXPERTLOOP_DATA_DIR": str(folder / "data"),
    }


@pytest.fixture
def served(installed: Path, tmp_path: Path) -> Iterator[str]:
    env = _environment(tmp_path)
    script = installed / "bin" / "expertloop"
    where = subprocess.run(
        [installed / "bin" / "python", "-c", "import expertloop; print(expertloop.__file__)"],
        cwd=tmp_path,
        env=env,
        capture_output=True,
        text=True,
        check=True,
    ).stdout.strip()
    assert Path(where).is_relative_to(installed), f"the venv imports {where}, not the wheel"
    upgraded = subprocess.run(
        [script, "db", "upgrade"], cwd=tmp_path, env=env, capture_output=True, text=True
    )
    assert upgraded.returncode == 0, upgraded.stderr
    port = free_port()
    log = (tmp_path / "serve.log").open("wb")
    process = subprocess.Popen(
        [script, "serve", "--host", "127.0.0.1", "--port", str(port)],
        cwd=tmp_path,
        env=env,
        stdout=log,
        stderr=log,
    )
    url = f"http://127.0.0.1:{port}"
    try:
        wait_until_healthy(process, url, tmp_path / "serve.log", START_SECONDS)
        yield url
    finally:
        stop(process)
        log.close()


@pytest.mark.slow
def test_the_installed_wheel_migrates_and_serves_the_sign_in_page(served: str) -> None:
    page = httpx.get(served + "/login", timeout=10)
    assert page.status_code == 200
    assert "<form" in page.text and 'name="password"' in page.text
    css = httpx.get(served + "/static/expertloop.css", timeout=10)
    assert css.status_code == 200 and css.headers["content-type"].startswith("text/css")
    ready = httpx.get(served + "/readyz", timeout=10)
    assert ready.status_code == 200, ready.text
