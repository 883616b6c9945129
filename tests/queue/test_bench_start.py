"""What the bench is sent: where a continuous answer starts (the loop's continuous_start), which
past commands the context carries (context_commands), key features; and the scene geometry
checked at upload (refused with the row and the field, the store unchanged)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from expertloop.ingest.schemas import StepRead
from expertloop.loops.spec import parse_spec
from expertloop.queue.bench import neutral_action, start_action
from tests.conftest import store_contents
from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC, discrete_rows, parquet_bytes
from tests.queue.conftest import continuous_rows

# speed_cmd [0, 2], curvature [-0.2, 0.2]
SPEC = parse_spec(CONTINUOUS_SPEC["features"], CONTINUOUS_SPEC["action_space"])


def step(index: int, expert: list[float] | None = None) -> StepRead:
    return StepRead(
        id=100 + index, rollout="r", step=index, time_s=0.1 * index, control="expert" if expert
        else "learner", features=[0.0], learner_action=[1.0, 0.1], expert_action=expert,
        learner_probs=None, learner_ensemble=None, learner_std=None, scene=None, image_sha256=None,
    )  # fmt: skip


def test_neutral_is_zero_where_the_bounds_allow_else_the_middle():
    assert neutral_action(SPEC.low, SPEC.high) == [0.0, 0.0]
    assert neutral_action(np.array([0.5, -3]), np.array([1.5, -1])) == [1.0, -2.0]


@pytest.mark.parametrize(
    "setting, before, learner, own, expected",
    [
        ("neutral", [step(0, [1.0, 0.1])], [1.2, 0.0], (0, [2.0, 0.2]), ([0.0, 0.0], "neutral")),
        ("previous", [step(0), step(1, [1.5, -0.1])], None, (0, [2.0, 0.2]), ([1.5, -0.1], "expert")),
        ("previous", [step(0), step(1)], None, (0, [2.0, 0.2]), ([2.0, 0.2], "yours")),
        ("previous", [], None, None, ([0.0, 0.0], "neutral")),
        ("learner", [], [1.2, 0.0], None, ([1.2, 0.0], "learner")),
        ("learner", [], None, None, ([0.0, 0.0], "neutral")),  # learner hidden on this item
    ],
)  # fmt: skip
def test_start_action(setting, before, learner, own, expected):
    spec = parse_spec(
        CONTINUOUS_SPEC["features"],
        CONTINUOUS_SPEC["action_space"],
        {"continuous_start": setting},
    )
    start = start_action(spec, before=before, learner=learner, own=own)
    assert (start.action, start.source) == expected


def _claim(client, headers, slug):
    got = client.post(f"/api/loops/{slug}/queue/claim", headers=headers)
    assert got.status_code == 200, got.text
    return got.json()["item"]


def test_previous_start_is_your_answer_on_the_step_before(make_loop, client, make_user):
    slug = make_loop(CONTINUOUS_SPEC, settings={"continuous_start": "previous"}, queue=3, start=4)
    ann = make_user("annotator", name="ann")
    first = _claim(client, ann, slug)
    assert first["start_from"] == "neutral" and first["start_action"] == [0.0, 0.0]
    body = {"submission_id": "start-test-0001", "answer": "action", "action": [1.25, -0.05]}
    sent = client.post(
        f"/api/loops/{slug}/queue/items/{first['item_id']}/labels", json=body, headers=ann
    )
    assert sent.status_code == 201
    second = _claim(client, ann, slug)
    assert second["state"]["step"] == first["state"]["step"] + 1
    assert second["start_from"] == "yours" and second["start_step"] == first["state"]["step"]
    assert second["start_action"] == pytest.approx([1.25, -0.05], abs=1e-6)  # float32


@pytest.mark.parametrize("setting", ["none", "expert", "all"])
def test_context_carries_past_commands_as_the_loop_allows(make_loop, client, make_user, setting):
    cols = continuous_rows(1, 10)
    cols["control"] = ["expert" if s == 2 else "learner" for s in range(10)]
    cols["expert_action"] = [[0.5, 0.1] if s == 2 else None for s in range(10)]
    slug = make_loop(CONTINUOUS_SPEC, settings={"context_commands": setting}, columns=cols,
                     queue=1, start=5)  # fmt: skip
    item = _claim(client, make_user("annotator", name="ann"), slug)
    context = {s["step"]: s for s in item["context"]}
    assert (context[2]["expert_command"] is not None) == (setting != "none")
    assert (context[3]["learner_command"] is not None) == (setting == "all")
    assert item["state"]["learner_command"] is None  # never the state's own learner action


def test_key_features_must_name_features(client, admin):
    bad = {**DISCRETE_SPEC, "settings": {"key_features": ["speed", "colour"]}}
    refused = client.post("/api/loops", json=bad, headers=admin)
    assert refused.status_code == 422 and "colour" in refused.json()["detail"]
    good = {**DISCRETE_SPEC, "settings": {"key_features": ["speed"]}}
    assert client.post("/api/loops", json=good, headers=admin).status_code == 201


GEOMETRY = [
    {"kind": "line", "points": [[0, 1.6], [12, 1.6]], "label": "aisle edge"},
    {"kind": "polygon", "points": [[7, 1.6], [10, 1.6], [10, -1.6]], "style": "keepout"},
]


@pytest.mark.parametrize(
    "geometry, problem",
    [
        ({"kind": "circle", "points": [[0, 0], [1, 1]]}, "geometry[0].kind must be 'line' or"),
        ({"kind": "polygon", "points": [[0, 0], [1, 1]]}, "geometry[0].points must be a list of 3"),
        ({"kind": "line", "points": [[0, 0], [1, "x"]]}, "geometry[0].points[1] must be [x, y]"),
        ({"kind": "line", "points": [[0, 0], [1e9, 0]]}, "geometry[0].points[1] must be finite"),
        ({"kind": "line", "points": [[0, 0], [1, 1]], "style": "red"}, "geometry[0].style must"),
        ({"kind": "line", "points": [[0, 0], [1, 1]], "colour": "red"}, "unknown fields"),
        ("view_m", "view_m must be a distance in metres"),
    ],
)
def test_scene_geometry_is_checked_at_upload(client, admin, uploader, engine, geometry, problem):
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    slug = DISCRETE_SPEC["slug"]
    client.post(f"/api/loops/{slug}/rounds", json={"learner_version": "v1"}, headers=admin)
    cols = discrete_rows(1, 4)
    good = {"frame": "robot", "agents": [], "geometry": GEOMETRY}
    bad = {**good, "view_m": -1} if geometry == "view_m" else {**good, "geometry": [geometry]}
    cols["scene"] = [json.dumps(good)] * 2 + [json.dumps(bad)] * 2
    before = store_contents(engine)
    refused = client.post(
        f"/api/loops/{slug}/rounds/1/rollouts",
        files={"file": ("r.parquet", parquet_bytes(cols))},
        headers=uploader,
    )
    assert refused.status_code == 422
    detail = refused.json()["detail"]
    assert detail.startswith("row 3, column scene: ") and problem in detail, detail
    assert store_contents(engine) == before
    cols["scene"] = [json.dumps(good)] * 4
    accepted = client.post(
        f"/api/loops/{slug}/rounds/1/rollouts",
        files={"file": ("r.parquet", parquet_bytes(cols))},
        headers=uploader,
    )
    assert accepted.status_code == 201, accepted.text
