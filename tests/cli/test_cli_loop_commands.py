"""The CLI covers the whole loop: rounds, snapshots, users' roles and activity, tokens, export
names, db upgrade's account of what it did, upload's checks before sending, spec errors."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from sqlalchemy import select, text

from expertloop.auth.models import User
from expertloop.client import Client
from expertloop.config import Settings
from expertloop.db import make_engine
from expertloop.demo.local_server import local_server
from expertloop.migrations_state import alembic_config
from tests.cli.test_cli import cli_env, run  # noqa: F401  (cli_env is a fixture)
from tests.helpers import DISCRETE_SPEC, discrete_rows, parquet_bytes

SLUG = DISCRETE_SPEC["slug"]


@pytest.fixture
def server(tmp_path):
    with local_server(Settings(data_dir=tmp_path / "srv", job_mode="thread")) as running:
        with Client(running.url, running.admin_token) as client:
            client.create_loop(DISCRETE_SPEC)
        yield running


def test_rounds_open_list_close(server):
    common = ["--url", server.url, "--token", server.admin_token]
    code, out = run("rounds", "open", "--loop", SLUG, "--learner-version", "v1", *common)
    assert code == 0 and f"opened round 1 of '{SLUG}' for learner v1" in out, out
    code, out = run("rounds", "list", "--loop", SLUG, *common)
    assert code == 0 and out.splitlines() == [
        "0\topen\tdemonstrations\t0 rollouts\t0 steps",
        "1\topen\tv1\t0 rollouts\t0 steps",
    ]
    code, out = run("rounds", "close", "--loop", SLUG, "--round", "1", *common)
    assert code == 0 and "closed round 1" in out
    code, out = run("rounds", "close", "--loop", SLUG, "--round", "7", *common)
    assert code == 2 and "refused" in out and "7" in out
    code, out = run("rounds", "open", "--loop", "no-such-loop", "--learner-version", "v", *common)
    assert code == 2 and "no-such-loop" in out
    # an annotator's token may not open rounds
    code, out = run(
        "rounds", "open", "--loop", SLUG, "--learner-version", "v2",
        "--url", server.url, "--token", server.annotator_token,
    )  # fmt: skip
    assert code == 2 and "admin" in out


def test_loops_log_mapping_sets_and_replaces_over_http(server, tmp_path):
    from tests.logs.bags import MAPPING

    common = ["--url", server.url, "--token", server.admin_token]
    mapping_file = tmp_path / "mapping.json"
    mapping_file.write_text(json.dumps(MAPPING))
    code, out = run("loops", "log-mapping", SLUG, str(mapping_file), *common)
    assert code == 0, out
    assert f"log mapping of '{SLUG}' set: 3 features from 2 topics at 10 steps a second" in out
    # a loop spec file: its log_mapping is sent
    spec_file = tmp_path / "spec.json"
    spec_file.write_text(
        json.dumps({**DISCRETE_SPEC, "log_mapping": {**MAPPING, "step_rate_hz": 5}})
    )
    code, out = run("loops", "log-mapping", SLUG, str(spec_file), *common)
    assert code == 0 and "at 5 steps a second" in out, out
    with Client(server.url, server.admin_token) as client:
        assert client.loop(SLUG)["log_mapping"]["step_rate_hz"] == 5
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({**MAPPING, "features": {"gap_m": MAPPING["features"]["gap_m"]}}))
    code, out = run("loops", "log-mapping", SLUG, str(bad), *common)
    assert code == 2 and "refused: log_mapping.features: no source for loop feature" in out, out
    code, out = run(
        "loops", "log-mapping", SLUG, str(mapping_file),
        "--url", server.url, "--token", server.annotator_token,
    )  # fmt: skip
    assert code == 2 and "refused" in out and "admin" in out, out
    code, out = run("loops", "log-mapping", SLUG, str(tmp_path / "missing.json"), *common)
    assert code == 2 and "cannot read" in out
    with Client(server.url, server.admin_token) as client:
        assert client.loop(SLUG)["log_mapping"]["step_rate_hz"] == 5  # refusals changed nothing


def test_upload_checks_loop_and_round_before_sending(server, tmp_path, monkeypatch):
    common = ["--url", server.url, "--token", server.admin_token]
    demos = tmp_path / "demos.parquet"
    demos.write_bytes(parquet_bytes(discrete_rows(2, 10, expert=True, prefix="demo")))
    sent: list[str] = []
    original = Client.upload

    def counting_upload(self, *args, **kwargs):
        sent.append(str(args))
        return original(self, *args, **kwargs)

    monkeypatch.setattr(Client, "upload", counting_upload)
    code, out = run("upload", str(demos), "--loop", SLUG, "--round", "3", *common)
    assert code == 2 and "before sending the file" in out and "no round 3" in out, out
    code, out = run("upload", str(demos), "--loop", "nope-loop", "--round", "0", *common)
    assert code == 2 and "before sending the file" in out and "nope-loop" in out
    run("rounds", "open", "--loop", SLUG, "--learner-version", "v1", *common)
    run("rounds", "close", "--loop", SLUG, "--round", "1", *common)
    code, out = run("upload", str(demos), "--loop", SLUG, "--round", "1", *common)
    assert code == 2 and "round 1" in out and "closed" in out
    assert sent == []  # none of the refused files was sent
    code, out = run("upload", str(demos), "--loop", SLUG, "--round", "0", *common)
    assert code == 0 and "stored 2 rollouts, 20 steps" in out and len(sent) == 1


def test_snapshots_create_list_and_export_names_files_by_version(server, tmp_path, monkeypatch):
    common = ["--url", server.url, "--token", server.admin_token]
    demos = tmp_path / "demos.parquet"
    demos.write_bytes(parquet_bytes(discrete_rows(2, 10, expert=True, prefix="demo")))
    assert run("upload", str(demos), "--loop", SLUG, "--round", "0", *common)[0] == 0
    code, out = run("snapshots", "create", "--loop", SLUG, *common)
    assert code == 0 and re.search(rf"^created v1 of '{SLUG}': 20 rows up to round 0", out), out
    code, out = run("snapshots", "create", "--loop", SLUG, "--up-to-round", "0", *common)
    assert code == 0 and out.startswith("unchanged, the same content is already v1")
    code, out = run("snapshots", "list", "--loop", SLUG, *common)
    assert code == 0 and out.startswith("v1\tup to round 0\t20 rows\t")
    monkeypatch.chdir(tmp_path)
    code, out = run("export", "--loop", SLUG, "--format", "npz", *common)
    assert code == 0, out
    assert (tmp_path / f"{SLUG}-v1.npz").exists() and not (tmp_path / f"{SLUG}-latest.npz").exists()
    code, out = run("export", "--loop", SLUG, "--version", "v1", "--format", "jsonl", *common)
    assert code == 0 and (tmp_path / f"{SLUG}-v1.jsonl").exists()
    code, out = run("export", "--loop", SLUG, "--version", "v9", *common)
    assert code == 2 and "v9" in out and not (tmp_path / f"{SLUG}-v9.parquet").exists()
    code, out = run("snapshots", "create", "--loop", SLUG, "--url", server.url, "--token", "x")
    assert code == 2 and "refused" in out


def test_users_role_deactivate_activate_and_tokens_issue(cli_env, app, client):  # noqa: F811
    code, out = run("users", "add", "carol", "--role", "annotator")
    assert code == 0
    first = re.search(r"API token \(shown once\): (\S+)", out).group(1)
    code, out = run("users", "role", "carol", "--role", "trainer", "--role", "annotator")
    assert code == 0 and out.strip() == "user 'carol': roles annotator -> annotator, trainer"
    code, out = run("tokens", "issue", "carol")
    second = re.search(r"API token \(shown once\): (\S+)", out).group(1)
    assert code == 0 and second != first
    for token in (first, second):
        me = client.get("/api/me", headers={"Authorization": f"Bearer {token}"})
        assert me.json()["roles"] == ["annotator", "trainer"]
    code, out = run("users", "deactivate", "carol")
    assert code == 0 and "deactivated" in out
    assert client.get("/api/me", headers={"Authorization": f"Bearer {second}"}).status_code == 401
    code, out = run("users", "list")
    assert "carol\tannotator,trainer\tno password\tdeactivated" in out
    code, out = run("users", "activate", "carol")
    assert code == 0
    assert client.get("/api/me", headers={"Authorization": f"Bearer {first}"}).status_code == 200
    code, out = run("users", "role", "carol", "--role", "pilot")
    assert code == 2 and "roles must be among" in out
    code, out = run("users", "deactivate", "nobody")
    assert code == 2 and "no user named 'nobody'" in out
    code, out = run("tokens", "issue", "nobody")
    assert code == 2 and "no user named 'nobody'" in out
    with app.state.session_factory() as session:
        carol = session.scalar(select(User).where(User.name == "carol"))
    assert carol.active and carol.roles == ["annotator", "trainer"]


def test_db_upgrade_says_what_it_did(tmp_path, monkeypatch):
    from alembic import command
    from alembic.script import ScriptDirectory

    head = ScriptDirectory.from_config(alembic_config("sqlite://")).get_current_head()
    url = f"sqlite:///{tmp_path / 'fresh.db'}"
    monkeypatch.setenv("EXPERTLOOP_DATABASE_URL", url)
    monkeypatch.setenv("EXPERTLOOP_DATA_DIR", str(tmp_path / "d"))
    from expertloop.config import get_settings

    get_settings.cache_clear()
    try:
        code, out = run("db", "upgrade")
        assert code == 0 and out.strip() == (
            f"created the database schema at revision {head} (the database was empty)"
        )
        code, out = run("db", "upgrade")
        assert out.strip() == f"already at revision {head} (the newest); nothing to do"
        command.downgrade(alembic_config(url), "-1")
        engine = make_engine(url)
        with engine.connect() as conn:
            older = conn.execute(text("SELECT version_num FROM alembic_version")).scalar()
        engine.dispose()
        code, out = run("db", "upgrade")
        assert out.strip() == f"upgraded the database schema from revision {older} to {head}"
    finally:
        get_settings.cache_clear()


@pytest.mark.parametrize(
    "change, expected",
    [
        ({"slug": "Bad Slug"}, "slug: must be lowercase letters, digits and '-'"),
        ({"colour": "red"}, "colour: is not a field of a loop spec"),
        (
            {"features": [{"name": "gap_m"}, {"name": "Speed"}]},
            "features[1].name: must be a lowercase name",
        ),
        (
            {"action_space": {"kind": "continuous", "dimensions": [{"name": "v", "low": 2}]}},
            "action_space.dimensions[0].high: is required",
        ),
        ({"action_space": {"kind": "joystick"}}, "action_space: kind must be 'discrete' or"),
        ({"settings": {"labels_per_state": 0}}, "settings.labels_per_state: must be greater"),
        ({"features": [{"name": "a"}, {"name": "a"}]}, "features: feature names must be unique"),
    ],
)
def test_spec_errors_in_plain_words(cli_env, tmp_path, change, expected):  # noqa: F811
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({**DISCRETE_SPEC, **change}))
    code, out = run("loops", "create", str(spec))
    assert code == 2 and expected in out, out
    assert "pydantic" not in out and "http" not in out and "type=" not in out


def test_readme_names_every_command():
    readme = Path(__file__).resolve().parents[2].joinpath("README.md").read_text()
    for command in (
        "expertloop rounds open",
        "expertloop rounds close",
        "expertloop rounds list",
        "expertloop snapshots create",
        "expertloop snapshots list",
        "expertloop users role",
        "expertloop users deactivate",
        "expertloop users activate",
        "expertloop tokens issue",
    ):
        assert command in readme, command
