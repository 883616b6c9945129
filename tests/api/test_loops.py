"""Loops and rounds through the API."""

from __future__ import annotations

import copy

from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC


def test_create_list_read_loop_with_documented_defaults(client, admin):
    created = client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    assert created.status_code == 201, created.text
    body = created.json()
    assert body["slug"] == "aisle-crossing"
    assert body["settings"]["labels_per_state"] == 1
    assert body["settings"]["lease_seconds"] == 300
    assert body["settings"]["audit_fraction"] == 0.1
    listed = client.get("/api/loops", headers=admin).json()
    assert listed["total"] == 1 and listed["items"][0]["title"] == DISCRETE_SPEC["title"]
    read = client.get("/api/loops/aisle-crossing", headers=admin).json()
    assert read["action_space"] == DISCRETE_SPEC["action_space"]


def test_new_loop_has_round_zero_for_demonstrations(client, admin):
    client.post("/api/loops", json=CONTINUOUS_SPEC, headers=admin)
    rounds = client.get("/api/loops/aisle-speed/rounds", headers=admin).json()["items"]
    assert [(r["number"], r["learner_version"], r["status"]) for r in rounds] == [
        (0, "demonstrations", "open")
    ]


def test_open_and_close_rounds(client, admin):
    client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    opened = client.post(
        "/api/loops/aisle-crossing/rounds", json={"learner_version": "bc-v1"}, headers=admin
    )
    assert opened.status_code == 201
    assert opened.json()["number"] == 1 and opened.json()["learner_version"] == "bc-v1"
    closed = client.post("/api/loops/aisle-crossing/rounds/1/close", headers=admin)
    assert closed.json()["status"] == "closed" and closed.json()["closed_at"]
    second = client.post(
        "/api/loops/aisle-crossing/rounds", json={"learner_version": "v2"}, headers=admin
    )
    assert second.json()["number"] == 2


def _bad(spec_change):
    spec = copy.deepcopy(DISCRETE_SPEC)
    spec_change(spec)
    return spec


BAD_SPECS = [
    (_bad(lambda s: s.update(slug="Bad Slug")), "slug"),
    (_bad(lambda s: s.update(features=[])), "features"),
    (_bad(lambda s: s["features"].append({"name": "gap_m", "unit": "m"})), "unique"),
    (_bad(lambda s: s["features"].append({"name": "step", "unit": ""})), "column names"),
    (_bad(lambda s: s.update(action_space={"kind": "discrete", "actions": ["go"]})), "actions"),
    (_bad(lambda s: s.update(action_space={"kind": "wiggle"})), "action_space"),
    (
        _bad(
            lambda s: s.update(
                action_space={
                    "kind": "continuous",
                    "dimensions": [{"name": "v", "low": 2, "high": 1}],
                }
            )
        ),
        "low",
    ),
    # actions are stored as float32 (docs/references.md, "Hostile input": largest finite value
    # about 3.4028235e38; 1 and 1 + 1e-9 are the same float32)
    (
        _bad(
            lambda s: s.update(
                action_space={
                    "kind": "continuous",
                    "dimensions": [{"name": "v", "low": -1e300, "high": 1e300}],
                }
            )
        ),
        "dimension v: bound -1e+300 is beyond float32's range",
    ),
    (
        _bad(
            lambda s: s.update(
                action_space={
                    "kind": "continuous",
                    "dimensions": [{"name": "v", "low": 1.0, "high": 1.000000001}],
                }
            )
        ),
        "are the same as float32",
    ),
    (_bad(lambda s: s.update(settings={"labels_per_state": 0})), "labels_per_state"),
    (_bad(lambda s: s.update(settings={"no_such_setting": 1})), "no_such_setting"),
]


def test_bad_specs_get_422_naming_the_field(client, admin, engine):
    from tests.conftest import store_contents

    before = store_contents(engine)
    for spec, field in BAD_SPECS:
        response = client.post("/api/loops", json=spec, headers=admin)
        assert response.status_code == 422, spec
        assert field in response.json()["detail"], (field, response.json()["detail"])
    assert store_contents(engine) == before


def test_duplicate_slug_is_a_conflict(client, admin):
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    again = client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    assert again.status_code == 409 and "aisle-crossing" in again.json()["detail"]


def test_unknown_loop_and_round_are_404(client, admin):
    assert client.get("/api/loops/nope", headers=admin).status_code == 404
    client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    response = client.post("/api/loops/aisle-crossing/rounds/7/close", headers=admin)
    assert response.status_code == 404 and "round 7" in response.json()["detail"]
