"""Which robot recorded a bag: the mapping reads it from the file's name, a topic's field or a
value of its own, and each stored rollout carries it (the contract's `robot` column)."""

from __future__ import annotations

import json
from concurrent.futures import ThreadPoolExecutor

import pytest

from expertloop.ingest.logs.writer import storage_file, typestore_for, write_bag
from tests.cli.test_cli import run
from tests.conftest import store_contents
from tests.helpers import DISCRETE_SPEC
from tests.logs.bags import MAPPING, NS, T0, TOPICS, build, header, tractor_messages
from tests.logs.test_log_upload import SLUG, make_loop, upload


def robots_of(client, headers):
    items = client.get(f"/api/loops/{SLUG}/rounds/1/rollouts", headers=headers).json()["items"]
    return {r["key"]: r["robot"] for r in items}


def test_robot_from_the_file_name(client, admin, uploader, tmp_path):
    robot = {"source": "file_name", "separator": "_", "part": 0}
    make_loop(client, admin, {**MAPPING, "robot": robot})
    path, _ = build(tmp_path, "mcap", name="tractor-07_2026-12-03-10-15-00")
    response = upload(client, uploader, path)
    assert response.status_code == 201, response.text
    assert robots_of(client, admin) == {"tractor-07_2026-12-03-10-15-00": "tractor-07"}


def test_robot_from_the_file_name_of_a_bag_folder_archive(client, admin, uploader, tmp_path):
    robot = {"source": "file_name", "separator": "_", "part": -1}  # the last part
    make_loop(client, admin, {**MAPPING, "robot": robot})
    path, _ = build(tmp_path, "sqlite3", name="2026-12-03_amr-12")  # sent as .tar
    assert path.name == "2026-12-03_amr-12.tar"
    assert upload(client, uploader, path).status_code == 201
    assert robots_of(client, admin) == {"2026-12-03_amr-12": "amr-12"}


def test_robot_as_the_mappings_own_value(client, admin, uploader, tmp_path):
    make_loop(client, admin, {**MAPPING, "robot": {"source": "value", "value": "tug 3"}})
    path, _ = build(tmp_path, "ros1")
    assert upload(client, uploader, path).status_code == 201
    assert robots_of(client, admin) == {"t07-run": "tug 3"}


def _with_robot_topics(storage, tmp_path, name="ids"):
    """The tractor log with each odometry frame id naming the robot ("amr-3/base_link") and an
    id topic (std_msgs String) saying "amr-3" at 0.5 s and "amr-4" from 2.5 s on."""
    ts = typestore_for(storage)
    messages, _ = tractor_messages(storage)
    for topic, _, message in messages:
        if topic == "/odom":
            stamp = message.header.stamp
            message.header = header(ts, storage, stamp.sec * NS + stamp.nanosec, "amr-3/base_link")
    String = ts.types["std_msgs/msg/String"]
    ids = [
        ("/robot_id", T0 + NS // 2, String(data="amr-3")),
        ("/robot_id", T0 + 5 * NS // 2, String(data="amr-4")),
    ]
    topics = {**TOPICS, "/robot_id": "std_msgs/msg/String"}
    ordered = sorted(messages + ids, key=lambda m: m[1])
    if storage == "ros1":
        return write_bag(tmp_path / f"{name}.bag", storage, topics, ordered, ts)
    return storage_file(write_bag(tmp_path / name, storage, topics, ordered, ts))


@pytest.mark.parametrize("storage", ["mcap", "ros1"])
def test_robot_from_a_frame_id(storage, client, admin, uploader, tmp_path):
    robot = {"source": "topic", "topic": "/odom", "field": "header.frame_id", "separator": "/"}
    make_loop(client, admin, {**MAPPING, "robot": robot})
    assert upload(client, uploader, _with_robot_topics(storage, tmp_path)).status_code == 201
    assert robots_of(client, admin) == {"ids": "amr-3"}


def test_robot_from_an_id_topic_per_rollout(client, admin, uploader, tmp_path):
    """Rollouts split at the takeover (2.0 to 3.0 s): the first two begin before the id topic
    says amr-4 (the first one even before it said anything: the first message counts), the
    third after."""
    robot = {"source": "topic", "topic": "/robot_id", "field": "data"}
    mapping = {**MAPPING, "robot": robot, "rollouts": {"split": "segments"}}
    make_loop(client, admin, mapping)
    response = upload(client, uploader, _with_robot_topics("mcap", tmp_path))
    assert response.status_code == 201, response.text
    assert robots_of(client, admin) == {"ids-001": "amr-3", "ids-002": "amr-3", "ids-003": "amr-4"}


def test_robot_from_a_number(client, admin, uploader, tmp_path):
    """An id published as a number (std_msgs UInt16) is stored as its digits."""
    ts = typestore_for("mcap")
    messages, _ = tractor_messages("mcap")
    ids = [
        ("/robot_number", T0 + i * NS, ts.types["std_msgs/msg/UInt16"](data=7)) for i in range(4)
    ]
    topics = {**TOPICS, "/robot_number": "std_msgs/msg/UInt16"}
    bag = write_bag(
        tmp_path / "numbered", "mcap", topics, sorted(messages + ids, key=lambda m: m[1]), ts
    )
    make_loop(
        client,
        admin,
        {**MAPPING, "robot": {"source": "topic", "topic": "/robot_number", "field": "data"}},
    )
    assert upload(client, uploader, storage_file(bag)).status_code == 201
    assert robots_of(client, admin) == {"numbered": "7"}


@pytest.mark.parametrize(
    "robot, bag_name, expected",
    [
        (
            {"source": "file_name", "separator": "_", "part": 1},
            "t07-run",
            "log_mapping.robot: the file name, part 1 split at '_': 't07-run' has 1 parts split at "
            "'_', no part 1",
        ),
        (
            {"source": "file_name", "separator": "-", "part": 0},
            "-07",
            "log_mapping.robot: the file name, part 0 split at '-': '-07' gives an empty robot name",
        ),
        (
            {"source": "topic", "topic": "/robot_id", "field": "data"},
            "t07-run",
            "topic /robot_id is not in the bag",
        ),
        (
            {"source": "topic", "topic": "/odom", "field": "pose.covariance"},
            "t07-run",
            "log_mapping.robot: topic /odom, field pose.covariance: is float64 (numbers), "
            "expected number or text",
        ),
        (
            {
                "source": "topic",
                "topic": "/odom",
                "field": "header.frame_id",
                "separator": "/",
                "part": 1,
            },
            "t07-run",
            "topic /odom, field header.frame_id, part 1 split at '/', at 0.000 s into the bag",
        ),
    ],
    ids=["no such part", "empty part", "missing topic", "not text", "frame id without part"],
)
def test_refusals_name_the_robots_source(
    robot, bag_name, expected, client, admin, uploader, engine, tmp_path
):
    make_loop(client, admin, {**MAPPING, "robot": robot})
    path, _ = build(tmp_path, "mcap", name=bag_name)
    before = store_contents(engine)
    response = upload(client, uploader, path)
    assert response.status_code == 422, response.text
    assert expected in response.json()["detail"]
    assert store_contents(engine) == before


def test_an_id_topic_without_messages_is_refused(client, admin, uploader, engine, tmp_path):
    messages, _ = tractor_messages("mcap")
    topics = {**TOPICS, "/robot_id": "std_msgs/msg/String"}  # declared, never published
    bag = write_bag(tmp_path / "silent", "mcap", topics, messages, typestore_for("mcap"))
    make_loop(
        client,
        admin,
        {**MAPPING, "robot": {"source": "topic", "topic": "/robot_id", "field": "data"}},
    )
    before = store_contents(engine)
    response = upload(client, uploader, storage_file(bag))
    assert response.status_code == 422
    assert response.json()["detail"] == (
        "log_mapping.robot: topic /robot_id: the bag holds no messages on it"
    )
    assert store_contents(engine) == before


def test_a_robot_name_outside_the_name_rules_is_refused_naming_its_source(
    client, admin, uploader, engine, tmp_path
):
    ts = typestore_for("mcap")
    messages, _ = tractor_messages("mcap")
    ids = [("/robot_id", T0, ts.types["std_msgs/msg/String"](data="r" * 201))]
    topics = {**TOPICS, "/robot_id": "std_msgs/msg/String"}
    bag = write_bag(
        tmp_path / "long", "mcap", topics, sorted(messages + ids, key=lambda m: m[1]), ts
    )
    make_loop(
        client,
        admin,
        {**MAPPING, "robot": {"source": "topic", "topic": "/robot_id", "field": "data"}},
    )
    before = store_contents(engine)
    response = upload(client, uploader, storage_file(bag))
    assert response.status_code == 422, response.text
    detail = response.json()["detail"]
    assert detail.startswith("robot from topic /robot_id, field data, at 0.003 s into the bag")
    assert "robot: 'rrrr" in detail and "at most 200 are allowed" in detail
    assert store_contents(engine) == before


@pytest.mark.parametrize(
    "robot, expected",
    [
        ({"source": "serial"}, "log_mapping.robot"),
        ({"source": "value", "value": ""}, "log_mapping.robot.value.value"),
        ({"source": "file_name", "part": 40}, "log_mapping.robot.file_name.part"),
        ({"source": "topic", "topic": "/robot_id"}, "log_mapping.robot.topic.field"),
        ({"source": "value", "value": "a", "part": 1}, "log_mapping.robot.value.part"),
    ],
    ids=["unknown source", "empty value", "part out of range", "topic without field", "stray key"],
)
def test_robot_rules_are_checked_with_the_mapping(robot, expected, client, admin, engine):
    before = store_contents(engine)
    spec = {**DISCRETE_SPEC, "log_mapping": {**MAPPING, "robot": robot}}
    response = client.post("/api/loops", json=spec, headers=admin)
    assert response.status_code == 422 and expected in response.json()["detail"], response.text
    assert store_contents(engine) == before


def test_the_dry_run_shows_each_rollouts_robot(tmp_path):
    path = _with_robot_topics("mcap", tmp_path)
    robot = {"source": "topic", "topic": "/robot_id", "field": "data"}
    mapping = {**MAPPING, "robot": robot, "rollouts": {"split": "segments"}}
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({**DISCRETE_SPEC, "log_mapping": mapping}))
    code, out = run("logs", "inspect", str(path), "--spec", str(spec))
    assert code == 0, out
    assert "rollout ids-001: 20 steps, robot amr-3" in out
    assert "rollout ids-003: 11 steps, robot amr-4" in out


def test_bags_of_two_robots_uploaded_at_once(client, admin, uploader, tmp_path):
    robot = {"source": "file_name", "separator": "_", "part": 0}
    make_loop(client, admin, {**MAPPING, "robot": robot})
    paths = [build(tmp_path, "mcap", name=f"tractor-0{i}_run")[0] for i in (1, 2)]
    with ThreadPoolExecutor(2) as pool:
        answers = list(pool.map(lambda path: upload(client, uploader, path), paths))
    assert [a.status_code for a in answers] == [201, 201], [a.text for a in answers]
    assert robots_of(client, admin) == {
        "tractor-01_run": "tractor-01",
        "tractor-02_run": "tractor-02",
    }
