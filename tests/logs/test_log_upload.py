"""Robot logs through the upload endpoint: ROS 2 MCAP, ROS 2 SQLite (bag folder as .tar and
.zip) and ROS 1 bags built here with rosbags' writers; every stored value is compared with the
messages written, resampled by reference functions (docs/references.md, "Resampling onto a step
grid: numpy.interp and scipy.interpolate.interp1d")."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest
from scipy.interpolate import interp1d

from expertloop.ingest.logs import gridding
from expertloop.ingest.logs.writer import storage_file, typestore_for, write_bag
from tests.conftest import store_contents
from tests.helpers import DISCRETE_SPEC
from tests.logs.bags import MAPPING, NS, T0, TOPICS, build, tractor_messages, zip_folder

ACTIONS = ["proceed", "creep", "hold"]
SLUG = DISCRETE_SPEC["slug"]


def make_loop(client, admin, mapping=MAPPING, spec=DISCRETE_SPEC):
    response = client.post("/api/loops", json={**spec, "log_mapping": mapping}, headers=admin)
    assert response.status_code == 201, response.text
    opened = client.post(
        f"/api/loops/{spec['slug']}/rounds", json={"learner_version": "v1"}, headers=admin
    )
    assert opened.status_code == 201
    return response.json()


def upload(client, headers, path, n=1, slug=SLUG):
    with path.open("rb") as fh:
        return client.post(
            f"/api/loops/{slug}/rounds/{n}/rollouts",
            files={"file": (path.name, fh.read())},
            headers=headers,
        )


def steps_of(client, headers, key, slug=SLUG):
    response = client.get(f"/api/loops/{slug}/rollouts/{key}/steps?limit=1000", headers=headers)
    assert response.status_code == 200, response.text
    return response.json()["items"]


def previous(times, values, grid, max_age_s):
    """Reference hold: scipy's previous-value interpolation, None where older than max_age_s."""
    t = (np.asarray(times) - T0).astype(np.float64)
    index = interp1d(
        t, np.arange(len(t)), kind="previous", bounds_error=False, fill_value=(-1, len(t) - 1)
    )((grid - T0).astype(np.float64))
    out = []
    for g, i in zip(grid, index.astype(int), strict=True):
        fresh = i >= 0 and g - times[i] <= max_age_s * NS
        out.append(values[i] if fresh else None)
    return out


@pytest.mark.parametrize("chunk", [None, 3], ids=["one-chunk", "chunks-of-3"])
@pytest.mark.parametrize("storage", ["mcap", "sqlite3", "ros1"])
def test_every_mapped_value_matches_the_messages_written(
    storage, chunk, client, admin, uploader, tmp_path, monkeypatch
):
    if chunk is not None:  # topics settle onto the grid every 3 messages: many chunk edges
        monkeypatch.setattr(gridding, "CHUNK", chunk)
    make_loop(client, admin)
    path, written = build(tmp_path, storage, stamp_lag_ns=7_000_000)
    response = upload(client, uploader, path)
    assert response.status_code == 201, response.text
    assert response.json()["rollouts"] == [{"key": "t07-run", "steps": 41}]
    steps = steps_of(client, admin, "t07-run")

    # the grid starts when every required topic (features, mode) has spoken; odom's header
    # stamps (7 ms before its log times) are its times, as the mapping's `auto` stamp says
    # and ends with the last message of any of them
    firsts = [written.times[t][0] for t in ("/odom", "/joint_states", "/mode")]
    lasts = [written.times[t][-1] for t in ("/odom", "/joint_states", "/mode")]
    grid = np.arange(max(firsts), max(lasts) + 1, NS // 10, dtype=np.int64)
    assert len(steps) == len(grid) == 41
    assert [s["step"] for s in steps] == list(range(41))
    np.testing.assert_allclose([s["time_s"] for s in steps], (grid - grid[0]) / NS)

    # linear interpolation: numpy.interp is the reference (times from the bag's start, as
    # float64 cannot hold nanoseconds since 1970 exactly)
    odom_t = (np.array(written.times["/odom"]) - T0).astype(np.float64)
    odom = np.array(written.values["/odom"])
    gap = np.interp((grid - T0).astype(np.float64), odom_t, odom[:, 0])
    speed = np.interp((grid - T0).astype(np.float64), odom_t, odom[:, 1])
    occluded = previous(written.times["/joint_states"], written.values["/joint_states"], grid, 0.25)
    features = np.array([s["features"] for s in steps])
    np.testing.assert_allclose(features[:, 0], gap, rtol=1e-6)
    np.testing.assert_allclose(features[:, 1], speed, rtol=1e-6)
    np.testing.assert_array_equal(features[:, 2], occluded)

    mode = previous(written.times["/mode"], written.values["/mode"], grid, 0.25)
    control = ["expert" if m == "MANUAL" else "learner" for m in mode]
    assert [s["control"] for s in steps] == control
    assert control.count("expert") == 10

    learner = previous(
        written.times["/policy/action"], written.values["/policy/action"], grid, 0.25
    )
    assert [s["learner_action"] for s in steps] == [ACTIONS[a] for a in learner]
    probs = previous(written.times["/policy/probs"], written.values["/policy/probs"], grid, 0.25)
    for s, p in zip(steps, probs, strict=True):
        np.testing.assert_allclose(s["learner_probs"], p, rtol=1e-6)
    teleop = previous(written.times["/teleop/action"], written.values["/teleop/action"], grid, 0.25)
    assert [s["expert_action"] for s in steps] == [
        None if a is None else ACTIONS[a] for a in teleop
    ]

    scenes = previous(written.times["/scene"], written.values["/scene"], grid, 1.0)
    assert [s["scene"] for s in steps] == [None if x is None else json.loads(x) for x in scenes]

    frame_t = np.array(written.times["/camera/compressed"])
    for s, g in zip(steps, grid, strict=True):
        distance = np.abs(frame_t - g)
        nearest = int(np.argmin(distance))  # the earlier frame on a tie, as documented
        if distance[nearest] > 0.1 * NS:
            assert s["image_sha256"] is None
            continue
        image = written.values["/camera/compressed"][nearest]
        assert s["image_sha256"] == hashlib.sha256(image).hexdigest()
        got = client.get(f"/api/images/{s['image_sha256']}", headers=admin)
        assert got.status_code == 200 and got.content == image


def test_ros2_bag_folder_as_zip_and_same_log_twice(client, admin, uploader, tmp_path):

    make_loop(client, admin)
    messages, _ = tractor_messages("sqlite3")
    bag = write_bag(tmp_path / "t07-zip", "sqlite3", TOPICS, messages, typestore_for("sqlite3"))
    path = zip_folder(bag, tmp_path / "t07-zip.zip")
    first = upload(client, uploader, path)
    assert first.status_code == 201, first.text
    assert first.json()["rollouts"] == [{"key": "t07-zip", "steps": 41}]
    again = upload(client, uploader, path)
    assert again.status_code == 201 and again.json()["duplicate_file"] is True
    rounds = client.get(f"/api/loops/{SLUG}/rounds", headers=admin).json()["items"]
    assert (rounds[1]["rollouts"], rounds[1]["steps"]) == (1, 41)


def test_segments_split_at_mode_changes(client, admin, uploader, tmp_path):
    mapping = {**MAPPING, "rollouts": {"split": "segments", "on_mode_change": True}}
    make_loop(client, admin, mapping)
    path, _ = build(tmp_path, "mcap")
    response = upload(client, uploader, path)
    assert response.status_code == 201, response.text
    assert response.json()["rollouts"] == [
        {"key": "t07-run-001", "steps": 20},
        {"key": "t07-run-002", "steps": 10},
        {"key": "t07-run-003", "steps": 11},
    ]
    middle = steps_of(client, admin, "t07-run-002")
    assert {s["control"] for s in middle} == {"expert"}
    assert middle[0]["time_s"] == 0.0 and middle[0]["step"] == 0


def test_gaps_split_and_stale_steps_drop(client, admin, uploader, tmp_path):
    """A 1.5 s silence of /joint_states: its steps drop (older than 0.25 s) and the rollout
    splits there (gap_s 0.5)."""

    mapping = {**MAPPING, "rollouts": {"split": "segments", "on_mode_change": False, "gap_s": 0.5}}
    make_loop(client, admin, mapping)
    messages, written = tractor_messages("mcap", seconds=6.0, takeover=(9.0, 9.0))
    silent = (written.times["/joint_states"][40], written.times["/joint_states"][70])
    kept = [m for m in messages if not (m[0] == "/joint_states" and silent[0] < m[1] < silent[1])]
    bag = write_bag(tmp_path / "gappy", "mcap", TOPICS, kept, typestore_for("mcap"))

    response = upload(client, uploader, storage_file(bag))
    assert response.status_code == 201, response.text
    rollouts = response.json()["rollouts"]
    # the grid runs from /mode's first message at 3.005 ms to its last at 6.003005 s: 61
    # steps; joint_states is silent from 2.003 s to 3.503 s, so the steps at 2.303..3.403 s
    # hold a value older than 0.25 s (12 steps) and drop, and the 1.2 s gap splits the log
    assert [r["steps"] for r in rollouts] == [23, 26]
    assert sum(r["steps"] for r in rollouts) == 61 - 12


def test_refuse_policy_names_topic_field_and_time(client, admin, uploader, engine, tmp_path):

    make_loop(client, admin, {**MAPPING, "on_missing": "refuse"})
    messages, _ = tractor_messages("mcap")
    kept = [
        m
        for i, m in enumerate(messages)
        if not (m[0] == "/joint_states" and 1.5 * NS < m[1] - messages[0][1] < 2.2 * NS)
    ]
    bag = write_bag(tmp_path / "stale", "mcap", TOPICS, kept, typestore_for("mcap"))
    before = store_contents(engine)
    response = upload(client, uploader, storage_file(bag))
    assert response.status_code == 422
    detail = response.json()["detail"]
    assert "topic /joint_states, field velocity[3]" in detail
    assert "s into the bag" in detail and "no value within 0.25 s" in detail
    assert store_contents(engine) == before


@pytest.mark.parametrize("storage", ["ros1", "mcap"])
def test_scene_from_our_own_message(storage, client, admin, uploader, tmp_path):
    from expertloop.ingest.logs.reader import SCENE_AGENT_TYPE, SCENE_TYPE

    ts = typestore_for(storage)
    messages, written = tractor_messages(storage)
    Scene, Agent = ts.types[SCENE_TYPE], ts.types[SCENE_AGENT_TYPE]
    scenes = []
    for i, t in enumerate(written.times["/scene"]):
        agent = Agent(kind="forklift", x=2.0 + i, y=-1.5, heading=0.5 * i)
        scenes.append(("/scene_msg", t + 1, Scene(frame="robot", agents=[agent])))
    topics = {**TOPICS, "/scene_msg": SCENE_TYPE}
    path = tmp_path / ("scene.bag" if storage == "ros1" else "scene")
    bag = write_bag(path, storage, topics, sorted(messages + scenes, key=lambda m: m[1]), ts)
    make_loop(client, admin, {**MAPPING, "scene": {"topic": "/scene_msg", "format": "message"}})
    response = upload(client, uploader, bag if storage == "ros1" else storage_file(bag))
    assert response.status_code == 201, response.text
    key = response.json()["rollouts"][0]["key"]
    steps = steps_of(client, admin, key)
    # scenes come every 0.5 s; the step 2.0 s into the rollout falls 3 µs before the fifth, so
    # it holds the fourth (i = 3)
    at_two = next(s for s in steps if abs(s["time_s"] - 2.0) < 1e-6)
    assert at_two["scene"] == {
        "frame": "robot",
        "agents": [{"kind": "forklift", "x": 5.0, "y": -1.5, "heading": 1.5}],
    }
