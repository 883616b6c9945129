"""Rollout upload: every format, the idempotence rules, and every refusal leaving the store as it was."""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pytest

from tests.conftest import store_contents
from tests.helpers import (
    CONTINUOUS_SPEC,
    DISCRETE_SPEC,
    discrete_rows,
    jsonl_bytes,
    npz_bytes,
    parquet_bytes,
)

URL = "/api/loops/aisle-crossing/rounds/{n}/rollouts"


@pytest.fixture
def loop(client, admin):
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    assert (
        client.post(
            "/api/loops/aisle-crossing/rounds", json={"learner_version": "v1"}, headers=admin
        ).status_code
        == 201
    )
    return "aisle-crossing"


def upload(client, headers, data: bytes, name="rollouts.parquet", n=1, url=URL):
    return client.post(url.format(n=n), files={"file": (name, data)}, headers=headers)


def test_parquet_upload_stores_rollouts_and_counts(client, loop, uploader, admin):
    response = upload(client, uploader, parquet_bytes(discrete_rows(3, 4)))
    assert response.status_code == 201, response.text
    body = response.json()
    assert body["steps"] == 12 and [r["key"] for r in body["rollouts"]] == ["r0", "r1", "r2"]
    rounds = client.get("/api/loops/aisle-crossing/rounds", headers=admin).json()["items"]
    assert (rounds[1]["rollouts"], rounds[1]["steps"]) == (3, 12)


def test_jsonl_and_npz_store_the_same_steps_as_parquet(client, loop, uploader, admin):
    cols = discrete_rows(1, 6, seed=4)
    assert upload(client, uploader, parquet_bytes(cols)).status_code == 201
    jsonl_cols = {**cols, "rollout": ["j0"] * 6}
    assert upload(client, uploader, jsonl_bytes(jsonl_cols), "a.jsonl").status_code == 201
    npz = {
        "rollout": np.array(["n0"] * 6),
        "step": np.array(cols["step"]),
        "time_s": np.array(cols["time_s"]),
        "features": np.array(cols["features"], dtype=np.float32),
        "learner_action": np.array(
            [["proceed", "creep", "hold"].index(a) for a in cols["learner_action"]]
        ),
        "learner_probs": np.array(cols["learner_probs"], dtype=np.float32),
    }
    response = upload(client, uploader, npz_bytes(npz), "a.npz")
    assert response.status_code == 201, response.text
    steps = {
        key: client.get(f"/api/loops/aisle-crossing/rollouts/{key}/steps", headers=admin).json()[
            "items"
        ]
        for key in ("r0", "j0", "n0")
    }
    for key in ("j0", "n0"):
        for a, b in zip(steps["r0"], steps[key], strict=True):
            assert a["features"] == b["features"]
            assert a["learner_action"] == b["learner_action"]
            np.testing.assert_allclose(a["learner_probs"], b["learner_probs"], rtol=1e-6)
            assert a["time_s"] == b["time_s"] and a["step"] == b["step"]


def test_features_as_one_column_per_feature(client, loop, uploader, admin):
    cols = discrete_rows(1, 3)
    feats = np.array(cols.pop("features"))
    for j, name in enumerate(["gap_m", "speed", "occluded"]):
        cols[name] = feats[:, j].tolist()
    assert upload(client, uploader, parquet_bytes(cols)).status_code == 201
    steps = client.get("/api/loops/aisle-crossing/rollouts/r0/steps", headers=admin).json()["items"]
    np.testing.assert_allclose([s["features"] for s in steps], feats, rtol=1e-6)


def test_same_file_twice_stores_nothing_new(client, loop, uploader, engine):
    data = parquet_bytes(discrete_rows(2, 3))
    first = upload(client, uploader, data).json()
    before = store_contents(engine)
    second = upload(client, uploader, data)
    assert second.status_code == 201
    assert second.json()["duplicate_file"] is True
    assert second.json()["rollouts"] == first["rollouts"]
    assert store_contents(engine) == before


def test_same_rollout_in_another_file_is_not_stored_twice(client, loop, uploader, admin):
    upload(client, uploader, parquet_bytes(discrete_rows(1, 3)))
    both = discrete_rows(1, 3)
    extra = discrete_rows(1, 3, seed=9, prefix="new")
    merged = {k: both[k] + extra[k] for k in both}
    response = upload(client, uploader, jsonl_bytes(merged), "more.jsonl").json()
    assert response["already_stored"] == ["r0"] and [r["key"] for r in response["rollouts"]] == [
        "new0"
    ]
    rounds = client.get("/api/loops/aisle-crossing/rounds", headers=admin).json()["items"]
    assert rounds[1]["steps"] == 6


def test_round_zero_takes_demonstrations(client, loop, uploader):
    response = upload(client, uploader, parquet_bytes(discrete_rows(2, 3, expert=True)), n=0)
    assert response.status_code == 201, response.text


def test_continuous_loop_upload_with_ensemble_and_std(client, admin, uploader):
    client.post("/api/loops", json=CONTINUOUS_SPEC, headers=admin)
    client.post("/api/loops/aisle-speed/rounds", json={"learner_version": "g1"}, headers=admin)
    rows = {
        "rollout": ["c0"] * 3,
        "step": [0, 1, 2],
        "time_s": [0.0, 0.1, 0.2],
        "features": [[1.0, 0.5], [0.9, 0.6], [0.8, 0.7]],
        "learner_action": [[0.5, 0.0], [0.6, 0.01], [0.7, -0.01]],
        "learner_ensemble": [[[0.5, 0.0], [0.6, 0.0]]] * 3,
        "learner_std": [[0.1, 0.01]] * 3,
        "control": ["learner", "learner", "expert"],
        "expert_action": [None, None, [0.2, 0.0]],
        "scene": [json.dumps({"agents": [{"kind": "pedestrian", "x": 3, "y": 1, "heading": 0}]})]
        * 3,
        "image": [b"\x89PNG\r\n\x1a\n fake", None, None],
    }
    url = "/api/loops/aisle-speed/rounds/{n}/rollouts"
    response = upload(client, uploader, parquet_bytes(rows), url=url)
    assert response.status_code == 201, response.text
    steps = client.get("/api/loops/aisle-speed/rollouts/c0/steps", headers=admin).json()["items"]
    np.testing.assert_allclose(steps[2]["expert_action"], [0.2, 0.0], atol=1e-7)
    # stored as float32, so compare at float32 precision
    np.testing.assert_allclose(steps[0]["learner_ensemble"], [[0.5, 0.0], [0.6, 0.0]], rtol=1e-7)
    assert steps[0]["scene"]["agents"][0]["kind"] == "pedestrian"
    assert steps[2]["control"] == "expert" and steps[0]["expert_action"] is None
    image = client.get(f"/api/images/{steps[0]['image_sha256']}", headers=admin)
    assert image.content == b"\x89PNG\r\n\x1a\n fake"


def test_state_with_context(client, loop, uploader, admin):
    upload(client, uploader, parquet_bytes(discrete_rows(1, 40)))
    steps = client.get(
        "/api/loops/aisle-crossing/rollouts/r0/steps?limit=100", headers=admin
    ).json()
    middle = steps["items"][20]
    ctx = client.get(
        f"/api/loops/aisle-crossing/states/{middle['id']}?seconds=1", headers=admin
    ).json()
    assert ctx["state"]["step"] == 20
    assert [s["step"] for s in ctx["before"]] == list(range(10, 20))
    assert [s["step"] for s in ctx["after"]] == list(range(21, 31))


def test_state_of_another_loop_or_none_is_404(client, loop, uploader, admin):
    """The window is read in one query that also checks the loop: another loop's state, or no
    state at all, is the 404 naming it, never another loop's steps."""
    upload(client, uploader, parquet_bytes(discrete_rows(1, 5)))
    step_id = client.get("/api/loops/aisle-crossing/rollouts/r0/steps", headers=admin).json()[
        "items"
    ][2]["id"]
    client.post("/api/loops", json=CONTINUOUS_SPEC, headers=admin)
    elsewhere = client.get(f"/api/loops/aisle-speed/states/{step_id}", headers=admin)
    assert elsewhere.status_code == 404
    assert f"loop 'aisle-speed' has no state {step_id}" in elsewhere.json()["detail"]
    missing = client.get("/api/loops/aisle-crossing/states/999999", headers=admin)
    assert missing.status_code == 404 and "no state 999999" in missing.json()["detail"]
    here = client.get(f"/api/loops/aisle-crossing/states/{step_id}?seconds=0.1", headers=admin)
    ctx = here.json()
    assert [s["step"] for s in ctx["before"] + [ctx["state"]] + ctx["after"]] == [1, 2, 3]


def test_paging(client, loop, uploader, admin):
    upload(client, uploader, parquet_bytes(discrete_rows(5, 2)))
    page = client.get(
        "/api/loops/aisle-crossing/rounds/1/rollouts?offset=2&limit=2", headers=admin
    ).json()
    assert page["total"] == 5 and [r["key"] for r in page["items"]] == ["r2", "r3"]
    steps = client.get(
        "/api/loops/aisle-crossing/rollouts/r4/steps?offset=1&limit=1", headers=admin
    ).json()
    assert steps["total"] == 2 and [s["step"] for s in steps["items"]] == [1]


# ---- refusals: (name, how to build the file, expected status, words the message must contain)


def _rows(change, **kw):
    cols = discrete_rows(2, 4, **kw)
    change(cols)
    return cols


def _set(column, row, value):
    def change(cols):
        cols[column][row] = value

    return change


def _probs_as_table(value):
    cols = discrete_rows(2, 4)
    cols["learner_probs"][3] = value
    return pa.table(cols)


def _truncated():
    data = parquet_bytes(discrete_rows(2, 4))
    return data[: len(data) // 2]


def _wrong_type():
    cols = discrete_rows(2, 4)
    cols["step"] = [str(s) for s in cols["step"]]
    return parquet_bytes(cols)


def _missing(column):
    cols = discrete_rows(2, 4)
    del cols[column]
    return parquet_bytes(cols)


REFUSALS = [
    (
        "wrong feature width",
        lambda: parquet_bytes(_rows(_set("features", 5, [1.0, 2.0]))),
        422,
        ["row 6", "features", "expected 3 values, got 2"],
    ),
    (
        "NaN feature",
        lambda: parquet_bytes(_rows(_set("features", 2, [1.0, float("nan"), 0.0]))),
        422,
        ["row 3", "features", "finite"],
    ),
    (
        "infinite feature",
        lambda: parquet_bytes(_rows(_set("features", 1, [1.0, float("inf"), 0.0]))),
        422,
        ["row 2", "features", "finite"],
    ),
    (
        "NaN probability",
        lambda: parquet_bytes(_probs_as_table([float("nan"), 0.5, 0.5])),
        422,
        ["row 4", "learner_probs", "finite"],
    ),
    (
        "negative probability",
        lambda: parquet_bytes(_probs_as_table([-0.2, 0.6, 0.6])),
        422,
        ["row 4", "learner_probs", "negative"],
    ),
    (
        "probabilities not summing to 1",
        lambda: parquet_bytes(_probs_as_table([0.3, 0.3, 0.3])),
        422,
        ["row 4", "learner_probs", "sum to 0.9"],
    ),
    (
        "unknown action",
        lambda: parquet_bytes(_rows(_set("learner_action", 7, "jump"))),
        422,
        ["row 8", "learner_action", "unknown action 'jump'"],
    ),
    (
        "duplicate step",
        lambda: parquet_bytes(_rows(_set("step", 1, 0))),
        422,
        ["step", "rollout 'r0' has step 0 twice"],
    ),
    (
        "missing required column",
        lambda: _missing("time_s"),
        422,
        ["missing required column 'time_s'"],
    ),
    ("missing features", lambda: _missing("features"), 422, ["missing required column 'features'"]),
    ("wrong column type", _wrong_type, 422, ["column step", "expected integers"]),
    ("truncated parquet", _truncated, 422, ["Parquet"]),
    (
        "time backwards",
        lambda: parquet_bytes(_rows(_set("time_s", 6, 0.05))),
        422,
        ["row 7", "time_s", "rollout 'r1' step 2"],
    ),
    (
        "bad control value",
        lambda: parquet_bytes(_rows(_set("control", 0, "autopilot"))),
        422,
        ["row 1", "control", "autopilot"],
    ),
    (
        "expert in control without an action",
        lambda: parquet_bytes(_rows(_set("control", 3, "expert"))),
        422,
        ["row 4", "expert_action", "missing"],
    ),
    (
        "scene not JSON",
        lambda: parquet_bytes(_rows(lambda c: c.update(scene=["{oops"] * 8))),
        422,
        ["row 1", "scene", "JSON"],
    ),
]


@pytest.mark.parametrize("name,build,status,words", REFUSALS, ids=[r[0] for r in REFUSALS])
def test_bad_files_are_refused_and_change_nothing(
    client, loop, uploader, engine, name, build, status, words
):
    upload(client, uploader, parquet_bytes(discrete_rows(1, 2, prefix="kept")))
    before = store_contents(engine)
    response = upload(client, uploader, build())
    assert response.status_code == status, response.text
    detail = response.json()["detail"]
    for word in words:
        assert word in detail, (word, detail)
    assert store_contents(engine) == before


def test_empty_file_is_refused(client, loop, uploader, engine):
    before = store_contents(engine)
    response = upload(client, uploader, b"")
    assert response.status_code == 422 and "empty" in response.json()["detail"]
    assert store_contents(engine) == before


def test_file_over_the_limit_is_413(client, loop, uploader, engine, settings):
    before = store_contents(engine)
    response = upload(client, uploader, b"PAR1" + b"\0" * (settings.max_upload_bytes + 70_000))
    assert response.status_code == 413 and "limit" in response.json()["detail"]
    assert store_contents(engine) == before
    assert not list(settings.upload_dir.glob("*")) if settings.upload_dir.exists() else True


def test_unknown_loop_round_and_closed_round(client, loop, uploader, admin, engine):
    data = parquet_bytes(discrete_rows(1, 2))
    before = store_contents(engine)
    missing_loop = upload(client, uploader, data, url="/api/loops/none/rounds/{n}/rollouts")
    assert missing_loop.status_code == 404 and "none" in missing_loop.json()["detail"]
    missing_round = upload(client, uploader, data, n=9)
    assert missing_round.status_code == 404 and "round 9" in missing_round.json()["detail"]
    client.post("/api/loops/aisle-crossing/rounds/1/close", headers=admin)
    before = store_contents(engine)
    closed = upload(client, uploader, data)
    assert closed.status_code == 409 and "closed" in closed.json()["detail"]
    assert store_contents(engine) == before


def test_round_zero_rows_must_be_demonstrations(client, loop, uploader, engine):
    before = store_contents(engine)
    response = upload(client, uploader, parquet_bytes(discrete_rows(1, 3)), n=0)
    assert response.status_code == 422 and "round 0" in response.json()["detail"]
    assert store_contents(engine) == before


def test_rollout_key_reused_with_different_content(client, loop, uploader, engine):
    upload(client, uploader, parquet_bytes(discrete_rows(1, 3, seed=1)))
    before = store_contents(engine)
    response = upload(client, uploader, parquet_bytes(discrete_rows(1, 3, seed=2)))
    assert response.status_code == 409 and "rollout key 'r0'" in response.json()["detail"]
    assert store_contents(engine) == before


def test_continuous_action_out_of_bounds(client, admin, uploader, engine):
    client.post("/api/loops", json=CONTINUOUS_SPEC, headers=admin)
    rows = {
        "rollout": ["c0", "c0"],
        "step": [0, 1],
        "time_s": [0.0, 0.1],
        "features": [[1.0, 0.5], [0.9, 0.6]],
        "expert_action": [[0.5, 0.0], [3.1, 0.0]],
    }
    before = store_contents(engine)
    response = upload(
        client, uploader, parquet_bytes(rows), url="/api/loops/aisle-speed/rounds/{n}/rollouts", n=0
    )
    assert response.status_code == 422
    assert (
        "row 2, column expert_action: speed_cmd = 3.1 is outside [0, 2] m/s"
        in response.json()["detail"]
    )
    assert store_contents(engine) == before


def test_continuous_action_exactly_at_a_bound_is_accepted(client, admin, uploader):
    # 0.2 and -0.2 are not exact in float32; stored actions are float32, so bounds compare there
    client.post("/api/loops", json=CONTINUOUS_SPEC, headers=admin)
    rows = {
        "rollout": ["c0", "c0"],
        "step": [0, 1],
        "time_s": [0.0, 0.1],
        "features": [[1.0, 0.5], [0.9, 0.6]],
        "expert_action": [[2.0, 0.2], [0.0, -0.2]],
    }
    response = upload(
        client, uploader, parquet_bytes(rows), url="/api/loops/aisle-speed/rounds/{n}/rollouts", n=0
    )
    assert response.status_code == 201, response.text


def test_stale_spooled_uploads_are_swept_at_start(settings):
    import os
    import time

    from expertloop.ingest.spool import sweep_stale

    settings.upload_dir.mkdir(parents=True)
    stale = settings.upload_dir / "upload-left-by-a-dead-process"
    fresh = settings.upload_dir / "upload-in-flight"
    stale.write_bytes(b"x")
    fresh.write_bytes(b"y")
    day_ago = time.time() - 2 * 24 * 3600
    os.utime(stale, (day_ago, day_ago))
    assert sweep_stale(settings.upload_dir) == 1
    assert not stale.exists() and fresh.exists()
