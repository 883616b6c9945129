"""The demo's invented robot log: its mapping is the one in the demo spec, the committed bag
uploads, and a recorded simulator run reads back as the very states it recorded."""

from __future__ import annotations

import json

import numpy as np

from expertloop.demo import bag, sim
from expertloop.demo import scenario as sc
from expertloop.demo.setup import BAG_FILE, DEMO_SPEC
from expertloop.ingest.logs.writer import storage_file
from tests.logs.test_log_upload import upload

SPEC = json.loads(DEMO_SPEC.read_text())
SLUG = SPEC["slug"]


def test_demo_spec_carries_the_bags_mapping():
    assert SPEC["log_mapping"] == bag.log_mapping()
    assert list(SPEC["log_mapping"]["features"]) == list(sc.FEATURE_NAMES)


def test_committed_demo_bag_uploads_with_its_takeover(client, admin, uploader):
    assert client.post("/api/loops", json=SPEC, headers=admin).status_code == 201
    client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin)
    response = upload(client, uploader, BAG_FILE, slug=SLUG)
    assert response.status_code == 201, response.text
    [rollout] = response.json()["rollouts"]
    assert rollout["key"] == "tow_tractor_run" and rollout["steps"] > 500
    steps = client.get(
        f"/api/loops/{SLUG}/rollouts/tow_tractor_run/steps?limit=1000", headers=admin
    ).json()["items"]
    expert = [s for s in steps if s["control"] == "expert"]
    assert expert and all(s["expert_action"] in ("proceed", "creep", "hold") for s in expert)
    assert all(len(s["learner_ensemble"]) == 5 for s in steps if s["learner_ensemble"])
    assert steps[0]["scene"]["frame"] == "robot"


def test_recorded_run_reads_back_as_its_states(client, admin, uploader, tmp_path):
    """An expert-driven simulator run, recorded and uploaded to round 0, gives back each step's
    features (as float32, as the simulator made them) and the expert's actions."""
    run = sim.rollout(None, 1, 5, kind="discrete", key_prefix="check", max_time_s=20.0)
    folder = bag.write_demo_bag(run, "check-0000", tmp_path)
    assert client.post("/api/loops", json=SPEC, headers=admin).status_code == 201
    response = upload(client, uploader, storage_file(folder), n=0, slug=SLUG)
    assert response.status_code == 201, response.text
    steps = client.get(
        f"/api/loops/{SLUG}/rollouts/check-0000/steps?limit=1000", headers=admin
    ).json()["items"]
    assert len(steps) == len(run.columns["step"])
    np.testing.assert_array_equal(
        np.array([s["features"] for s in steps], dtype=np.float32), run.columns["features"]
    )
    actions = [sc.DISCRETE_ACTIONS[a] for a in run.columns["expert_action"]]
    assert [s["expert_action"] for s in steps] == actions
    np.testing.assert_allclose([s["time_s"] for s in steps], run.columns["time_s"], atol=1e-9)
