"""The `expertloop` command: users, tokens, loops from a spec file, upload and rank over HTTP."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from typer.testing import CliRunner

from expertloop.cli import cli
from expertloop.config import Settings, get_settings
from expertloop.demo.local_server import local_server
from tests.helpers import DISCRETE_SPEC, discrete_rows, parquet_bytes

runner = CliRunner()


@pytest.fixture
def cli_env(database_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> dict[str, str]:
    env = {"EXPERTLOOP_DATABASE_URL": database_url, "EXPERTLOOP_DATA_DIR": str(tmp_path / "d")}
    for key, value in env.items():
        monkeypatch.setenv(key, value)
    get_settings.cache_clear()
    yield env
    get_settings.cache_clear()


def run(*args: str) -> tuple[int, str]:
    result = runner.invoke(cli, list(args))
    return result.exit_code, result.output


def test_users_tokens_and_loops(cli_env, tmp_path, monkeypatch):
    monkeypatch.setenv("EXPERTLOOP_NEW_PASSWORD", "s3cret-pass")
    code, out = run("users", "add", "alice", "--role", "admin", "--password")
    assert code == 0, out
    token = re.search(r"API token \(shown once\): (\S+)", out).group(1)
    code, out = run("users", "add", "fleet-7", "--role", "uploader", "--role", "trainer")
    assert code == 0 and "trainer, uploader" in out.replace("roles ", "")
    code, out = run("users", "list")
    assert "alice\tadmin\tpassword" in out and "fleet-7\ttrainer,uploader\tno password" in out
    code, out = run("users", "add", "bob", "--role", "pilot")
    assert code == 2 and "roles must be among" in out
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps(DISCRETE_SPEC))
    code, out = run("loops", "create", str(spec))
    assert code == 0 and "aisle-crossing" in out, out
    code, out = run("loops", "list")
    assert out.startswith("aisle-crossing\tdiscrete\t3 features")
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({**DISCRETE_SPEC, "slug": "Bad Slug"}))
    code, out = run("loops", "create", str(bad))
    assert code == 2 and "slug" in out
    code, out = run("tokens", "revoke", token[:10])
    assert code == 0 and "revoked 1" in out
    code, out = run("tokens", "revoke", token[:10])
    assert code == 2 and "no live token" in out


def test_upload_and_rank_over_http(tmp_path):
    settings = Settings(data_dir=tmp_path / "srv", job_mode="thread")
    with local_server(settings) as server:
        common = ["--url", server.url, "--token", server.admin_token]
        from expertloop.client import Client

        with Client(server.url, server.admin_token) as client:
            client.create_loop(DISCRETE_SPEC)
            client.open_round("aisle-crossing", "v1")
        demos = tmp_path / "demos.parquet"
        demos.write_bytes(parquet_bytes(discrete_rows(3, 20, expert=True, prefix="demo")))
        code, out = run("upload", str(demos), "--loop", "aisle-crossing", "--round", "0", *common)
        assert code == 0 and "stored 3 rollouts, 60 steps" in out, out
        code, out = run("upload", str(demos), "--loop", "aisle-crossing", "--round", "0", *common)
        assert code == 0 and "uploaded before; nothing new stored" in out
        runs = tmp_path / "runs.parquet"
        runs.write_bytes(parquet_bytes(discrete_rows(4, 60, seed=3)))
        code, out = run("upload", str(runs), "--loop", "aisle-crossing", "--round", "1", *common)
        assert code == 0, out
        code, out = run("upload", str(runs), "--loop", "aisle-crossing", "--round", "0", *common)
        assert code == 2 and "refused" in out and "round 0" in out
        code, out = run(
            "rank",
            "--loop",
            "aisle-crossing",
            "--round",
            "1",
            "--budget",
            "10",
            "--seed",
            "4",
            *common,
        )
        assert code == 0, out
        assert "chose 10 states (1 audit) of 240 candidates against 60 training states" in out
