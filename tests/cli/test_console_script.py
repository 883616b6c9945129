"""The installed `expertloop` console script, run in a subprocess as users run it.

Every test starts from a fresh store: a new data folder (SQLite: the file inside it), or, when
EXPERTLOOP_TEST_DATABASE_URL names a PostgreSQL database, that database with an empty schema
(migrated again afterwards for the tests that follow). The script is the one installed beside
the interpreter running the tests, and must run this tree's code (in CI the clone is installed
in editable mode; in a worktree, use a virtual environment with the worktree installed).
"""

from __future__ import annotations

import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import httpx
import pyarrow.parquet as pq
import pytest
from sqlalchemy import text

from expertloop.db import make_engine
from tests.conftest import PG_URL
from tests.docs.readme import code_blocks, inline_code
from tests.helpers import DISCRETE_SPEC, discrete_rows, parquet_bytes
from tests.logs.bags import MAPPING
from tests.packaging.hidden import hide
from tests.serving import stop, upgrade_empty, wait_until_healthy

SCRIPT = Path(sys.executable).parent / "expertloop"
REPOSITORY = Path(__file__).resolve().parents[2]
START_SECONDS = 180
TOKEN = re.compile(r"API token \(shown once\): (\S+)")

# Every command of the CLI, each run below; the README must show exactly these.
EXERCISED = {
    "db upgrade",
    "users add",
    "users list",
    "tokens issue",
    "tokens revoke",
    "users role",
    "users deactivate",
    "users activate",
    "rounds open",
    "rounds list",
    "rounds close",
    "snapshots create",
    "snapshots list",
    "loops create",
    "loops list",
    "loops log-mapping",
    "logs inspect",
    "serve",
    "worker",
    "upload",
    "rank",
    "export",
    "demo-run",
}


def _clean_environment() -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("EXPERTLOOP_")}
    env.pop("PYTHONPATH", None)  # the script finds the code as installed, nothing else
    return env | {"NO_COLOR": "1", "COLUMNS": "200"}


def _not_installed(reason: str) -> None:
    """A missing script, or one that runs another checkout's code, would test something else:
    fail and say how to install this tree (the README's test command does)."""
    pytest.fail(reason)


@pytest.fixture(scope="module")
def script(tmp_path_factory: pytest.TempPathFactory) -> Path:
    if not SCRIPT.is_file():
        _not_installed(f"no expertloop console script beside {sys.executable}: pip install -e .")
    interpreter = SCRIPT.read_text().splitlines()[0].removeprefix("#!").strip()
    found = subprocess.run(
        [interpreter, "-c", "import expertloop; print(expertloop.__file__)"],
        cwd=tmp_path_factory.mktemp("where"),
        env=_clean_environment(),
        capture_output=True,
        text=True,
        check=True,
    ).stdout.strip()
    if Path(found).resolve() != REPOSITORY / "app" / "__init__.py":
        _not_installed(f"{SCRIPT} runs {found}, not this tree: install it (pip install -e .)")
    return SCRIPT


@pytest.fixture
def store(tmp_path: Path) -> Iterator[dict[str, str]]:
    """The environment of a user with a fresh, empty store."""
    env = _clean_environment() | {"EXPERTLOOP_DATA_DIR": str(tmp_path / "data")}
    if PG_URL:
        engine = make_engine(PG_URL)
        with engine.begin() as conn:
            conn.execute(text("DROP SCHEMA public CASCADE"))
            conn.execute(text("CREATE SCHEMA public"))
        engine.dispose()
        env["EXPERTLOOP_DATABASE_URL"] = PG_URL
    yield env
    if PG_URL:
        upgrade_empty(PG_URL)  # the tests after this one expect the migrated schema


def run(
    script: Path, env: dict[str, str], *args: str, expect: int = 0, timeout: float = 300
) -> str:
    """Run `expertloop ARGS` in the store's environment; its output (stdout, then stderr)."""
    done = subprocess.run(
        [str(script), *args],
        env=env,
        cwd=env["EXPERTLOOP_DATA_DIR"].removesuffix("/data"),
        capture_output=True,
        text=True,
        timeout=timeout,
    )
    output = done.stdout + done.stderr
    assert done.returncode == expect, f"expertloop {' '.join(args)}: {done.returncode}\n{output}"
    return output


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@contextmanager
def running(script: Path, env: dict[str, str], *args: str) -> Iterator[tuple[str, Path]]:
    """`expertloop serve ARGS` on a free loopback port until the block ends: its URL and log."""
    port = _free_port()
    log = Path(env["EXPERTLOOP_DATA_DIR"]).with_name(f"serve-{port}.log")
    with log.open("wb") as sink:
        process = subprocess.Popen(
            [str(script), "serve", "--port", str(port), *args],
            env=env,
            stdout=sink,
            stderr=subprocess.STDOUT,
        )
        try:
            url = f"http://127.0.0.1:{port}"
            wait_until_healthy(process, url, log, START_SECONDS)
            yield url, log
        finally:
            stop(process)


def _healthy(url: str) -> bool:
    try:
        return httpx.get(url + "/healthz", timeout=2).status_code == 200
    except httpx.TransportError:
        return False


def token_of(output: str) -> str:
    found = TOKEN.search(output)
    assert found, output
    return found.group(1)


def test_accounts_on_a_fresh_store(script: Path, store: dict[str, str]) -> None:
    created = run(script, store, "db", "upgrade")
    assert "created the database schema at revision" in created
    assert "already at revision" in run(script, store, "db", "upgrade")
    with_password = store | {"EXPERTLOOP_NEW_PASSWORD": "s3cret-pass"}
    out = run(script, with_password, "users", "add", "alice", "--role", "admin", "--password")
    assert "created user 'alice' with roles admin" in out
    assert token_of(out).startswith("el_")
    out = run(script, store, "users", "add", "fleet-7", "--role", "uploader")
    assert "created user 'fleet-7' with roles uploader" in out
    first = token_of(out)
    out = run(script, store, "users", "list")
    assert "alice\tadmin\tpassword" in out and "fleet-7\tuploader\tno password" in out
    second = token_of(run(script, store, "tokens", "issue", "fleet-7"))
    assert second != first and second.startswith("el_")
    assert "revoked 1 token(s)" in run(script, store, "tokens", "revoke", first[:10])
    assert "no live token" in run(script, store, "tokens", "revoke", first[:10], expect=2)
    assert "roles must be among" in run(
        script, store, "users", "add", "bob", "--role", "pilot", expect=2
    )
    assert "no user named 'nobody'" in run(script, store, "tokens", "issue", "nobody", expect=2)
    out = run(script, store, "users", "role", "fleet-7", "--role", "uploader", "--role", "trainer")
    assert "user 'fleet-7': roles uploader -> trainer, uploader" in out
    assert "deactivated" in run(script, store, "users", "deactivate", "fleet-7")
    assert "fleet-7\ttrainer,uploader\tno password\tdeactivated" in run(
        script, store, "users", "list"
    )
    run(script, store, "users", "activate", "fleet-7")
    assert "deactivated" not in run(script, store, "users", "list")


def test_loops_create_on_a_fresh_store(script: Path, store: dict[str, str], tmp_path: Path) -> None:
    run(script, store, "db", "upgrade")
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps(DISCRETE_SPEC))
    out = run(script, store, "loops", "create", str(spec))
    assert "created loop 'aisle-crossing' with round 0 open" in out
    assert run(script, store, "loops", "list").startswith("aisle-crossing\tdiscrete\t3 features")
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({**DISCRETE_SPEC, "slug": "Bad Slug"}))
    assert "not a valid loop spec" in run(script, store, "loops", "create", str(bad), expect=2)


def test_loops_list_on_a_fresh_store(script: Path, store: dict[str, str]) -> None:
    run(script, store, "db", "upgrade")
    assert run(script, store, "loops", "list") == ""


def test_logs_inspect_of_the_demo_bag(script: Path, store: dict[str, str]) -> None:
    bag = REPOSITORY / "demo_data" / "tow_tractor_run.mcap"
    spec = REPOSITORY / "demo_data" / "tow_tractor_discrete.json"
    out = run(script, store, "logs", "inspect", str(bag), "--spec", str(spec))
    assert "/tractor/odom" in out and "tow_msgs/msg/CrossingView" in out
    assert "rollout tow_tractor_run:" in out and "upload would be accepted" in out
    out = run(script, store, "logs", "inspect", str(bag))
    assert "no log mapping given" in out
    assert "is not a robot log" in run(script, store, "logs", "inspect", str(spec), expect=2)


def _api(url: str, token: str, method: str, path: str, **kwargs: Any) -> Any:
    answer = httpx.request(
        method, url + path, headers={"Authorization": f"Bearer {token}"}, timeout=60, **kwargs
    )
    assert answer.status_code < 300, answer.text
    return answer.json()


def test_upload_rank_and_export_through_a_served_store(
    script: Path, store: dict[str, str], tmp_path: Path
) -> None:
    run(script, store, "db", "upgrade")
    admin = token_of(run(script, store, "users", "add", "alice", "--role", "admin"))
    fleet = token_of(run(script, store, "users", "add", "fleet-7", "--role", "uploader"))
    demonstrations = tmp_path / "round0.parquet"
    demonstrations.write_bytes(parquet_bytes(discrete_rows(2, 5, expert=True, prefix="d")))
    rollouts = tmp_path / "round1.parquet"
    rollouts.write_bytes(parquet_bytes(discrete_rows(4, 30, seed=1)))
    narrow = discrete_rows(1, 2, seed=2, prefix="n")
    narrow["features"] = [f[:2] for f in narrow["features"]]
    wrong_width = tmp_path / "narrow.parquet"
    wrong_width.write_bytes(parquet_bytes(narrow))
    with running(script, store) as (url, _):
        _api(url, admin, "POST", "/api/loops", json=DISCRETE_SPEC)
        where = ("--loop", "aisle-crossing", "--url", url)
        mapping = tmp_path / "mapping.json"
        mapping.write_text(json.dumps(MAPPING))
        setting = ("loops", "log-mapping", "aisle-crossing", str(mapping), "--url", url)
        out = run(script, store, *setting, "--token", admin)
        assert "log mapping of 'aisle-crossing' set: 3 features from 2 topics" in out
        assert "refused:" in run(script, store, *setting, "--token", fleet, expect=2)
        out = run(
            script, store, "upload", str(demonstrations), "--round", "0", *where, "--token", fleet
        )
        assert "stored 2 rollouts, 10 steps" in out
        from_environment = store | {"EXPERTLOOP_URL": url, "EXPERTLOOP_TOKEN": fleet}
        again = ("upload", str(demonstrations), "--loop", "aisle-crossing", "--round", "0")
        out = run(script, from_environment, *again)
        assert "uploaded before; nothing new stored" in out
        refused = ("upload", str(wrong_width), "--round", "0", *where, "--token", fleet)
        out = run(script, store, *refused, expect=2)
        assert "refused:" in out and "features" in out
        opening = ("rounds", "open", "--learner-version", "v1", *where, "--token", admin)
        assert "opened round 1 of 'aisle-crossing' for learner v1" in run(script, store, *opening)
        listed = run(script, store, "rounds", "list", *where, "--token", fleet).splitlines()
        assert [line.split("\t")[:2] for line in listed] == [["0", "open"], ["1", "open"]]
        out = run(script, store, "upload", str(rollouts), "--round", "1", *where, "--token", fleet)
        assert "stored 4 rollouts, 120 steps" in out
        ranking = ("rank", "--round", "1", "--budget", "6", *where)
        out = run(script, store, *ranking, "--seed", "3", "--token", admin)
        assert re.search(r"chose 6 states \(1 audit\) of 120 candidates against 10 training", out)
        assert "refused:" in run(script, store, *ranking, "--token", fleet, expect=2)
        creating = ("snapshots", "create", "--up-to-round", "0", *where, "--token", admin)
        out = run(script, store, *creating)
        assert "created v1 of 'aisle-crossing': 10 rows up to round 0" in out
        listing = ("snapshots", "list", *where, "--token", admin)
        assert run(script, store, *listing).startswith("v1\tup to round 0\t10 rows\t")
        snapshot = _api(url, admin, "GET", "/api/loops/aisle-crossing/snapshots/v1")
        closing = ("rounds", "close", "--round", "1", *where, "--token", admin)
        assert "closed round 1" in run(script, store, *closing)
        target = tmp_path / "train.parquet"
        exporting = ("export", "--version", "v1", "--format", "parquet", "--out", str(target))
        out = run(script, store, *exporting, *where, "--token", admin)
        assert f"wrote {target}: v1 of 'aisle-crossing', 10 rows" in out
        assert snapshot["content_sha256"] in out
        assert pq.read_table(target).num_rows == 10


def test_worker_runs_until_stopped(script: Path, store: dict[str, str]) -> None:
    run(script, store, "db", "upgrade")
    log = Path(store["EXPERTLOOP_DATA_DIR"]).with_name("worker.log")
    with log.open("wb") as sink:
        worker = subprocess.Popen(
            [str(script), "worker"], env=store, stdout=sink, stderr=subprocess.STDOUT
        )
        try:
            deadline = time.monotonic() + START_SECONDS
            while "running" not in log.read_text():
                assert worker.poll() is None, log.read_text()
                assert time.monotonic() < deadline, log.read_text()
                time.sleep(0.2)
            worker.send_signal(signal.SIGTERM)
            assert worker.wait(timeout=60) == 0
        finally:
            if worker.poll() is None:
                worker.kill()
                worker.wait()
    assert "worker stopped" in log.read_text()


@pytest.mark.slow
def test_serve_demo_needs_no_demo_extra(
    script: Path, store: dict[str, str], tmp_path: Path
) -> None:
    # The README's first command installs no extra: serve --demo runs without scikit-learn.
    without_sklearn = store | {"PYTHONPATH": str(hide(tmp_path, "sklearn"))}
    with running(script, without_sklearn, "--demo") as (url, log):
        printed = log.read_text()
        assert "/loops/tow-tractor-crossings-discrete/bench" in printed, printed
        assert "demo-annotator" in printed
        assert httpx.get(url + "/login", timeout=30).status_code == 200


def test_demo_run_without_the_demo_extra_says_how_to_get_it(
    script: Path, store: dict[str, str], tmp_path: Path
) -> None:
    without_sklearn = store | {"PYTHONPATH": str(hide(tmp_path, "sklearn"))}
    out = run(script, without_sklearn, "demo-run", "--rounds", "1", expect=2)
    assert "pip install 'expertloop[demo]'" in out


@pytest.mark.slow
def test_demo_run_one_round(script: Path, store: dict[str, str], tmp_path: Path) -> None:
    plot = tmp_path / "demo-run.svg"
    out = run(
        script,
        store,
        "demo-run",
        "--rounds",
        "1",
        "--budget",
        "20",
        "--seed",
        "0",
        "--plot",
        str(plot),
        timeout=900,
    )
    assert "invented demo: discrete actions, ranked selection, budget 20, seed 0" in out
    assert f"plot written to {plot}" in out
    assert plot.read_text().startswith("<svg")


def cli_commands() -> set[str]:
    from typer.main import get_command

    from expertloop.cli import cli

    found = set()

    def walk(command: Any, path: tuple[str, ...]) -> None:
        subs = getattr(command, "commands", None)
        if subs:
            for name, sub in subs.items():
                walk(sub, (*path, name))
        else:
            found.add(" ".join(path))

    walk(get_command(cli), ())
    return found


def readme_commands() -> set[str]:
    """Commands the README shows in code (blocks and inline), as `group sub` or `command`."""
    groups = {c.split()[0] for c in cli_commands() if " " in c}
    shown = set()
    snippets = [block.text for block in code_blocks()] + inline_code()
    for snippet in snippets:
        for match in re.finditer(
            r"(?:^|[\s&|;(`])expertloop +([a-z][\w-]*)(?: +([a-z][\w-]*))?", snippet
        ):
            first, second = match.groups()
            shown.add(f"{first} {second}" if first in groups and second else first)
    return shown


def test_the_readme_shows_every_command_and_only_real_ones() -> None:
    assert readme_commands() == cli_commands()


def test_every_command_is_run_here() -> None:
    assert cli_commands() == EXERCISED
