"""`expertloop logs inspect` (the dry run) and `expertloop upload` of a bag over HTTP."""

from __future__ import annotations

import json

from expertloop.config import Settings
from expertloop.demo.local_server import local_server
from tests.cli.test_cli import run
from tests.helpers import DISCRETE_SPEC
from tests.logs.bags import MAPPING, build
from tests.logs.test_log_upload import SLUG


def test_inspect_with_a_spec_file_lists_topics_and_steps(tmp_path):
    path, written = build(tmp_path, "mcap")
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({**DISCRETE_SPEC, "log_mapping": MAPPING}))
    code, out = run("logs", "inspect", str(path), "--spec", str(spec))
    assert code == 0, out
    odom = next(line for line in out.splitlines() if line.strip().startswith("/odom "))
    # 81 messages 50 ms apart: 20 per second
    assert odom.split()[1:4] == ["81", "20.00", "nav_msgs/msg/Odometry"]
    assert "step grid: 41 steps" in out and "rollout t07-run: 41 steps" in out
    assert "upload would be accepted" in out


def test_inspect_without_a_mapping_lists_topics_only(tmp_path):
    path, _ = build(tmp_path, "ros1")
    code, out = run("logs", "inspect", str(path))
    assert code == 0, out
    assert "/mode" in out and "std_msgs/msg/String" in out and "no log mapping given" in out


def test_inspect_names_what_an_upload_would_refuse(tmp_path):
    path, _ = build(tmp_path, "mcap")
    features = {**MAPPING["features"], "speed": {"topic": "/odometry", "field": "twist.x"}}
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({**DISCRETE_SPEC, "log_mapping": {**MAPPING, "features": features}}))
    code, out = run("logs", "inspect", str(path), "--spec", str(spec))
    assert code == 0 and "refused" in out and "topic /odometry is not in the bag" in out


def test_inspect_with_the_loops_mapping_and_upload_over_http(tmp_path):
    path, _ = build(tmp_path, "ros1")
    settings = Settings(data_dir=tmp_path / "srv", job_mode="off")
    with local_server(settings) as server:
        common = ["--url", server.url, "--token", server.admin_token]
        from expertloop.client import Client

        with Client(server.url, server.admin_token) as client:
            client.create_loop({**DISCRETE_SPEC, "log_mapping": MAPPING})
            client.open_round(SLUG, "v1")
        code, out = run("logs", "inspect", str(path), "--loop", SLUG, *common)
        assert code == 0 and "upload would be accepted" in out, out
        code, out = run("upload", str(path), "--loop", SLUG, "--round", "1", *common)
        assert code == 0 and "stored 1 rollouts, 41 steps" in out, out
        code, out = run("logs", "inspect", str(path), "--loop", "no-such-loop", *common)
        assert code == 2 and "cannot fetch loop 'no-such-loop'" in out


def test_inspect_names_the_part_of_a_spec_file_that_is_not_valid(tmp_path):
    # The log mapping is fine; the features are not: the message must say so, not blame the
    # mapping (and a spec that is not an object, or lacks its features, is refused by name too).
    path, _ = build(tmp_path, "mcap")
    spec = tmp_path / "spec.json"
    broken_features = [{"name": "", "unit": "m"}]
    spec.write_text(
        json.dumps({**DISCRETE_SPEC, "features": broken_features, "log_mapping": MAPPING})
    )
    code, out = run("logs", "inspect", str(path), "--spec", str(spec))
    assert code == 2 and "features or action_space are not valid" in out, out
    assert "log_mapping is not valid" not in out

    spec.write_text(
        json.dumps({**DISCRETE_SPEC, "log_mapping": {**MAPPING, "step_rate_hz": "fast"}})
    )
    code, out = run("logs", "inspect", str(path), "--spec", str(spec))
    assert code == 2 and "the log_mapping is not valid" in out, out

    spec.write_text(json.dumps({"log_mapping": MAPPING}))
    code, out = run("logs", "inspect", str(path), "--spec", str(spec))
    assert code == 2 and "features or action_space are not valid" in out, out

    spec.write_text(json.dumps([MAPPING]))
    code, out = run("logs", "inspect", str(path), "--spec", str(spec))
    assert code == 2 and "a loop spec is a JSON object" in out, out
