"""An existing loop gets a log mapping, or a new one, through PUT /api/loops/{slug}/log-mapping
(admin): checked exactly as in a new loop's spec, refused with 422 naming the problem and leaving
the store as it was, and safe when several arrive at once."""

from __future__ import annotations

import copy
from concurrent.futures import ThreadPoolExecutor

import pytest

from tests.conftest import store_contents
from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC
from tests.logs.bags import MAPPING, build
from tests.logs.test_log_upload import SLUG, upload

URL = f"/api/loops/{SLUG}/log-mapping"


@pytest.fixture
def plain_loop(client, admin):
    """The discrete test loop, created without a log mapping, with round 1 open."""
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    opened = client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin)
    assert opened.status_code == 201


def test_a_loop_without_mapping_gets_one_and_then_reads_bags(
    client, plain_loop, admin, uploader, tmp_path
):
    path, _ = build(tmp_path, "mcap")
    before = upload(client, uploader, path)
    assert before.status_code == 422 and "has no log mapping" in before.json()["detail"]

    answer = client.put(URL, json={"log_mapping": MAPPING}, headers=admin)
    assert answer.status_code == 200, answer.text
    assert answer.json()["log_mapping"]["features"]["speed"]["field"] == "twist.twist.linear.x"
    shown = client.get(f"/api/loops/{SLUG}", headers=uploader).json()["log_mapping"]
    assert shown == answer.json()["log_mapping"]

    stored = upload(client, uploader, path)
    assert stored.status_code == 201, stored.text
    assert stored.json()["rollouts"] == [{"key": "t07-run", "steps": 41}]


def test_replacing_the_mapping_changes_later_uploads_only(
    client, plain_loop, admin, uploader, tmp_path
):
    assert client.put(URL, json={"log_mapping": MAPPING}, headers=admin).status_code == 200
    first, _ = build(tmp_path, "mcap", name="first")
    assert upload(client, uploader, first).json()["rollouts"] == [{"key": "first", "steps": 41}]

    slower = {**MAPPING, "step_rate_hz": 5}
    answer = client.put(URL, json={"log_mapping": slower}, headers=admin)
    assert answer.status_code == 200 and answer.json()["log_mapping"]["step_rate_hz"] == 5
    second, _ = build(tmp_path, "mcap", name="second")
    # 4 s of log at 5 steps a second: the grid from the first mode message to the last
    assert upload(client, uploader, second).json()["rollouts"] == [{"key": "second", "steps": 21}]
    rollouts = client.get(f"/api/loops/{SLUG}/rounds/1/rollouts", headers=admin).json()["items"]
    assert {r["key"]: r["steps"] for r in rollouts} == {"first": 41, "second": 21}


def _without(mapping, *path):
    out = copy.deepcopy(mapping)
    target = out
    for key in path[:-1]:
        target = target[key]
    del target[path[-1]]
    return out


BAD_MAPPINGS = {
    "feature without source": (
        _without(MAPPING, "features", "occluded"),
        "log_mapping.features: no source for loop feature 'occluded'",
    ),
    "source for no feature": (
        {**MAPPING, "features": {**MAPPING["features"], "tilt": {"topic": "/odom", "field": "x"}}},
        "log_mapping.features: 'tilt' is not a feature of the loop",
    ),
    "wrong unit": (
        {
            **MAPPING,
            "features": {
                **MAPPING["features"],
                "gap_m": {**MAPPING["features"]["gap_m"], "unit": "ft"},
            },
        },
        "log_mapping.features.gap_m: unit 'ft' is not the loop's 'm'",
    ),
    "unknown action": (
        {
            **MAPPING,
            "expert_action": {"topic": "/teleop/action", "field": "data", "values": {"0": "fly"}},
        },
        "log_mapping.expert_action.values: 'fly' is not an action",
    ),
    "continuous action for a discrete loop": (
        {
            **MAPPING,
            "learner_action": {"dimensions": {"v": {"topic": "/cmd", "field": "linear.x"}}},
        },
        "log_mapping.learner_action: a discrete loop takes one topic and field",
    ),
    "step rate zero": ({**MAPPING, "step_rate_hz": 0}, "log_mapping.step_rate_hz"),
    "bad field path": (
        {
            **MAPPING,
            "features": {**MAPPING["features"], "speed": {"topic": "/odom", "field": "a..b"}},
        },
        "log_mapping.features.speed.field",
    ),
    "misspelt key": ({**MAPPING, "step_rate": 10}, "log_mapping.step_rate"),
    "segments without a way to split": (
        {**_without(MAPPING, "control"), "rollouts": {"split": "segments"}},
        "rollouts: split 'segments' needs a control topic with on_mode_change, or gap_s",
    ),
}


@pytest.mark.parametrize("name", list(BAD_MAPPINGS))
def test_refusals_name_the_problem_as_loop_creation_does(name, client, plain_loop, admin, engine):
    mapping, expected = BAD_MAPPINGS[name]
    assert client.put(URL, json={"log_mapping": MAPPING}, headers=admin).status_code == 200
    before = store_contents(engine)
    answer = client.put(URL, json={"log_mapping": mapping}, headers=admin)
    assert answer.status_code == 422, answer.text
    assert expected in answer.json()["detail"]
    assert store_contents(engine) == before
    # the same mapping in a new loop's spec is refused for the same reason
    spec = {**DISCRETE_SPEC, "slug": "another-loop", "log_mapping": mapping}
    created = client.post("/api/loops", json=spec, headers=admin)
    assert created.status_code == 422 and expected in created.json()["detail"]
    assert store_contents(engine) == before


def test_a_continuous_loop_takes_every_dimension(client, admin, engine):
    assert client.post("/api/loops", json=CONTINUOUS_SPEC, headers=admin).status_code == 201
    url = f"/api/loops/{CONTINUOUS_SPEC['slug']}/log-mapping"
    features = {
        "gap_m": {"topic": "/state", "field": "data[0]"},
        "speed": {"topic": "/state", "field": "data[1]"},
    }
    speed_only = {"dimensions": {"speed_cmd": {"topic": "/cmd", "field": "linear.x"}}}
    before = store_contents(engine)
    answer = client.put(
        url,
        json={
            "log_mapping": {"step_rate_hz": 10, "features": features, "learner_action": speed_only}
        },
        headers=admin,
    )
    assert answer.status_code == 422
    assert (
        "log_mapping.learner_action.dimensions: give exactly the loop's dimensions"
        in (answer.json()["detail"])
    )
    assert store_contents(engine) == before
    both = {
        "dimensions": {
            "speed_cmd": {"topic": "/cmd", "field": "linear.x"},
            "curvature": {"topic": "/cmd", "field": "angular.z"},
        }
    }
    answer = client.put(
        url,
        json={"log_mapping": {"step_rate_hz": 10, "features": features, "learner_action": both}},
        headers=admin,
    )
    assert answer.status_code == 200, answer.text
    assert set(answer.json()["log_mapping"]["learner_action"]["dimensions"]) == {
        "speed_cmd",
        "curvature",
    }


@pytest.mark.parametrize(
    "body, expected",
    [
        ({}, "log_mapping: Field required"),
        ({"log_mapping": None}, "log_mapping"),
        ({"log_mapping": "step_rate_hz=10"}, "log_mapping"),
        ([MAPPING], "log_mapping"),
    ],
    ids=["no mapping", "null", "text", "a list"],
)
def test_malformed_bodies_are_refused(body, expected, client, plain_loop, admin, engine):
    before = store_contents(engine)
    answer = client.put(URL, json=body, headers=admin)
    assert answer.status_code == 422 and expected in answer.json()["detail"], answer.text
    assert store_contents(engine) == before
    not_json = client.put(URL, content=b"{", headers={**admin, "Content-Type": "application/json"})
    assert not_json.status_code == 422
    assert store_contents(engine) == before


def test_an_unknown_loop_is_404(client, admin, engine):
    before = store_contents(engine)
    answer = client.put(
        "/api/loops/no-such-loop/log-mapping", json={"log_mapping": MAPPING}, headers=admin
    )
    assert answer.status_code == 404 and "no-such-loop" in answer.json()["detail"]
    assert store_contents(engine) == before


def test_only_admins_set_mappings(client, plain_loop, uploader, engine):
    before = store_contents(engine)
    answer = client.put(URL, json={"log_mapping": MAPPING}, headers=uploader)
    assert answer.status_code == 403
    assert store_contents(engine) == before


def test_mappings_sent_at_once_leave_one_of_them_whole(client, plain_loop, admin):
    rates = [2, 4, 5, 8, 10, 20]
    bodies = [{"log_mapping": {**MAPPING, "step_rate_hz": rate}} for rate in rates]
    bad = {"log_mapping": _without(MAPPING, "features", "speed")}

    def put(body):
        return client.put(URL, json=body, headers=admin)

    with ThreadPoolExecutor(4) as pool:
        answers = list(pool.map(put, [*bodies, bad, *bodies[::-1]]))
    codes = [a.status_code for a in answers]
    assert codes == [200] * 6 + [422] + [200] * 6, [a.text for a in answers]
    final = client.get(f"/api/loops/{SLUG}", headers=admin).json()["log_mapping"]
    assert final in [a.json()["log_mapping"] for a in answers if a.status_code == 200]
    assert "no source for loop feature 'speed'" in answers[6].json()["detail"]
