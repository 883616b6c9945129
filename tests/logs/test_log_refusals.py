"""Bad robot logs get a 4xx naming topic, field and time, and leave the store as it was."""

from __future__ import annotations

import io
import sqlite3
import tarfile
import zipfile

import numpy as np
import pytest

from expertloop.ingest.logs.writer import storage_file, typestore_for, write_bag
from tests.conftest import store_contents
from tests.helpers import DISCRETE_SPEC, parquet_bytes
from tests.logs.bags import MAPPING, NS, TOPICS, build, tractor_messages
from tests.logs.test_log_upload import SLUG, make_loop, upload

POLICY_TYPE = "tow_msgs/msg/PolicyOutput"
POLICY_DEFINITION = "uint8 action\nfloat32[3] probs\nfloat64 gap\n"


def refused(client, uploader, engine, path, status=422):
    before = store_contents(engine)
    response = upload(client, uploader, path)
    assert response.status_code == status, response.text
    assert store_contents(engine) == before
    return response.json()["detail"]


@pytest.fixture
def loop(client, admin):
    return make_loop(client, admin)


def test_missing_topic_is_named(client, loop, uploader, engine, tmp_path):
    messages, _ = tractor_messages("mcap")
    topics = {t: m for t, m in TOPICS.items() if t != "/joint_states"}
    bag = write_bag(
        tmp_path / "no-joints",
        "mcap",
        topics,
        [m for m in messages if m[0] != "/joint_states"],
        typestore_for("mcap"),
    )
    detail = refused(client, uploader, engine, storage_file(bag))
    assert "topic /joint_states is not in the bag" in detail
    assert "/odom" in detail  # the bag's topics are listed


def test_unknown_field_path_is_named(client, admin, uploader, engine, tmp_path):
    features = {**MAPPING["features"], "speed": {"topic": "/odom", "field": "twist.twist.linear.w"}}
    make_loop(client, admin, {**MAPPING, "features": features})
    path, _ = build(tmp_path, "ros1")
    detail = refused(client, uploader, engine, path)
    assert "topic /odom, field twist.twist.linear.w" in detail
    assert "has no field 'w' (fields: x, y, z)" in detail


def test_index_past_a_fixed_array_and_into_a_number_are_named(
    client, admin, uploader, engine, tmp_path
):
    path, _ = build(tmp_path, "mcap")
    features = {**MAPPING["features"], "speed": {"topic": "/odom", "field": "pose.covariance[36]"}}
    make_loop(client, admin, {**MAPPING, "features": features})
    detail = refused(client, uploader, engine, path)
    assert "topic /odom, field pose.covariance[36]" in detail and "36 elements" in detail


def test_index_past_a_sequence_names_topic_field_and_time(
    client, admin, uploader, engine, tmp_path
):
    features = {
        **MAPPING["features"],
        "occluded": {"topic": "/joint_states", "field": "velocity[4]"},
    }
    make_loop(client, admin, {**MAPPING, "features": features})
    path, _ = build(tmp_path, "mcap")
    detail = refused(client, uploader, engine, path)
    assert "topic /joint_states, field velocity[4]" in detail and "s into the bag" in detail


def test_stamps_going_back_are_refused(client, loop, uploader, engine, tmp_path):
    messages, _ = tractor_messages("mcap")
    odom = [m for m in messages if m[0] == "/odom"]
    odom[10][2].header.stamp.sec -= 1  # the 11th odom message claims a second earlier
    bag = write_bag(tmp_path / "back", "mcap", TOPICS, messages, typestore_for("mcap"))
    detail = refused(client, uploader, engine, storage_file(bag))
    assert "topic /odom, field header.stamp: message 11" in detail
    assert "stamps must not go back in time" in detail


@pytest.mark.parametrize("storage", ["mcap", "ros1"])
def test_truncated_bag_is_refused(client, loop, uploader, engine, tmp_path, storage):
    path, _ = build(tmp_path, storage)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    detail = refused(client, uploader, engine, path)
    assert "truncated or damaged" in detail


def test_truncated_tar_is_refused(client, loop, uploader, engine, tmp_path):
    path, _ = build(tmp_path, "sqlite3")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 3])
    assert "truncated or damaged" in refused(client, uploader, engine, path)


def _custom_type_bag(tmp_path, storage):
    from rosbags.typesys import get_types_from_msg

    ts = typestore_for(storage)
    ts.register(get_types_from_msg(POLICY_DEFINITION, POLICY_TYPE))
    messages, written = tractor_messages(storage)
    Policy = ts.types[POLICY_TYPE]
    extra = []
    for t, value in zip(
        written.times["/policy/action"], written.values["/policy/action"], strict=True
    ):
        probs = np.array([0.2, 0.3, 0.5], dtype=np.float32)
        extra.append(
            ("/policy/out", t + 10, Policy(action=value, probs=probs, gap=float(value) / 2))
        )
    topics = {**TOPICS, "/policy/out": POLICY_TYPE}
    bag = write_bag(
        tmp_path / f"custom-{storage}",
        storage,
        topics,
        sorted(messages + extra, key=lambda m: m[1]),
        ts,
    )
    return bag, written


def test_custom_message_is_decoded_from_the_bags_definition(client, admin, uploader, tmp_path):
    mapping = {
        **MAPPING,
        "learner_action": {"topic": "/policy/out", "field": "action"},
        "learner_probs": {"topic": "/policy/out", "field": "probs"},
    }
    make_loop(client, admin, mapping)
    bag, written = _custom_type_bag(tmp_path, "mcap")
    response = upload(client, uploader, storage_file(bag))
    assert response.status_code == 201, response.text
    steps = client.get(f"/api/loops/{SLUG}/rollouts/custom-mcap/steps?limit=100", headers=admin)
    actions = [s["learner_action"] for s in steps.json()["items"]]
    assert actions[:6] == ["proceed", "creep", "hold", "proceed", "creep", "hold"]


def test_custom_type_without_definition_is_refused(client, admin, uploader, engine, tmp_path):
    mapping = {**MAPPING, "learner_action": {"topic": "/policy/out", "field": "action"}}
    make_loop(client, admin, mapping)
    bag, _ = _custom_type_bag(tmp_path, "sqlite3")
    with sqlite3.connect(storage_file(bag)) as db:  # a recorder that stores no definition
        db.execute("DELETE FROM message_definitions WHERE topic_type = ?", (POLICY_TYPE,))
    buffer = io.BytesIO()
    with tarfile.open(fileobj=buffer, mode="w") as archive:
        archive.add(bag, arcname=bag.name)
    path = tmp_path / "custom.tar"
    path.write_bytes(buffer.getvalue())
    detail = refused(client, uploader, engine, path)
    assert f"topic /policy/out: message type '{POLICY_TYPE}' is not in the standard" in detail


def test_loop_without_mapping_refuses_logs(client, admin, uploader, engine, tmp_path):
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin)
    path, _ = build(tmp_path, "mcap")
    assert "has no log mapping" in refused(client, uploader, engine, path)


def test_validation_rules_name_the_log_place(client, admin, uploader, engine, tmp_path):
    """A continuous action outside its bounds is refused as in files, naming topic and time."""
    from tests.helpers import CONTINUOUS_SPEC

    dims = {
        "speed_cmd": {"topic": "/odom", "field": "twist.twist.linear.x"},
        "curvature": {"topic": "/odom", "field": "pose.pose.position.x"},  # 10 m: far outside
    }
    features = {k: v for k, v in MAPPING["features"].items() if k != "occluded"}
    mapping = {
        **{k: v for k, v in MAPPING.items() if k not in ("learner_probs", "expert_action")},
        "features": features,
        "learner_action": {"dimensions": dims},
    }
    make_loop(client, admin, mapping, spec=CONTINUOUS_SPEC)
    path, _ = build(tmp_path, "mcap")
    before = store_contents(engine)
    response = upload(client, uploader, path, slug=CONTINUOUS_SPEC["slug"])
    assert response.status_code == 422 and store_contents(engine) == before
    detail = response.json()["detail"]
    # the bag begins with its first message, 3 ms after T0, where the grid begins too
    assert detail.startswith("topic /odom, field pose.pose.position.x, at 0.000 s into the bag")
    assert detail.endswith("learner_action: curvature = 10 is outside [-0.2, 0.2] 1/m")


def test_unmapped_mode_value_is_named(client, admin, uploader, engine, tmp_path):
    control = {**MAPPING["control"], "values": {"AUTO": "learner"}}
    make_loop(client, admin, {**MAPPING, "control": control})
    path, _ = build(tmp_path, "mcap")
    detail = refused(client, uploader, engine, path)
    assert "topic /mode, field data: value 'MANUAL' at 2.0" in detail


@pytest.mark.parametrize(
    "name",
    ["../evil/metadata.yaml", "/abs/metadata.yaml", "C:/x/metadata.yaml"],
)
def test_zip_members_outside_the_folder_are_refused(client, loop, uploader, engine, tmp_path, name):
    path = tmp_path / "evil.zip"
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr("bag/metadata.yaml", "x")
        archive.writestr(name, "x")
    detail = refused(client, uploader, engine, path)
    assert "refused" in detail and name.split("/")[0] in detail
    assert not (tmp_path / "evil").exists()


def test_tar_links_are_refused(client, loop, uploader, engine, tmp_path):
    path = tmp_path / "link.tar"
    with tarfile.open(path, "w") as archive:
        link = tarfile.TarInfo("bag/metadata.yaml")
        link.type = tarfile.SYMTYPE
        link.linkname = "/etc/passwd"
        archive.addfile(link)
    assert "is not a plain file or folder" in refused(client, uploader, engine, path)


def test_unpacked_size_limit(client, app, loop, uploader, engine, tmp_path):
    app.state.settings.max_unpacked_bytes = 1000
    path = tmp_path / "big.zip"
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("bag/data.mcap", b"\0" * 100_000)  # compresses to a few hundred bytes
    assert "larger than the limit of 1000 bytes" in refused(client, uploader, engine, path, 413)


def test_files_still_upload_beside_logs(client, loop, uploader, tmp_path):
    from tests.helpers import discrete_rows

    path = tmp_path / "rows.parquet"
    path.write_bytes(parquet_bytes(discrete_rows(1, 3)))
    assert upload(client, uploader, path).status_code == 201


def test_mapping_must_fit_the_loop(client, admin):
    features = {k: v for k, v in MAPPING["features"].items() if k != "speed"}
    response = client.post(
        "/api/loops",
        json={**DISCRETE_SPEC, "log_mapping": {**MAPPING, "features": features}},
        headers=admin,
    )
    assert response.status_code == 422 and "no source for loop feature 'speed'" in response.text
    wrong_unit = {**MAPPING["features"], "speed": {**MAPPING["features"]["speed"], "unit": "km/h"}}
    response = client.post(
        "/api/loops",
        json={**DISCRETE_SPEC, "log_mapping": {**MAPPING, "features": wrong_unit}},
        headers=admin,
    )
    assert response.status_code == 422 and "unit 'km/h' is not the loop's 'm/s'" in response.text
    assert NS == 10**9
