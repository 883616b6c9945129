"""Snapshots through the API: manifests, idempotent creation, immutability, content hash, access.

Expected counts come from the hand-built scenario below (common practice: small hand-checkable
cases); rows and hashes are checked against tests/snapshots/reference.py, a plain-SQL, row-by-row
reference that shares no code with app/snapshots.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from expertloop.config import Settings
from expertloop.main import create_app
from expertloop.migrations_state import upgrade
from expertloop.safety import SAFETY_CAUTION
from tests.conftest import store_contents
from tests.snapshots.conftest import (
    BASE,
    LATE_ROLLOUT,
    SLUG,
    Labeller,
    build_discrete,
    read_parquet,
    upload,
)
from tests.snapshots.reference import as_tuples, loop_row, reference_hash, reference_rows


def _label_scenario(labeller: Labeller) -> list[int]:
    """Labels on round 1's learner steps; returns those step ids."""
    steps = labeller.learner_steps(SLUG, 1)
    labeller.add(SLUG, steps[0], [1, 1, 2])  # creep, 2 of 3 votes
    labeller.add(SLUG, steps[1], [0, 2])  # tie: unresolved
    labeller.add(SLUG, steps[2], [None])  # only unsure: unresolved
    labeller.add(SLUG, steps[3], [2, None])  # hold; unsure does not vote
    labeller.add(SLUG, steps[4], [0])  # proceed
    return steps


def _create(client, headers, **body):
    return client.post(f"{BASE}/snapshots", json=body, headers=headers)


def _export(client, headers, version="v1", **params):
    response = client.get(f"{BASE}/snapshots/{version}/export", params=params, headers=headers)
    assert response.status_code == 200, response.text
    return response.content


def _reference(engine, snapshot: dict) -> list[dict]:
    manifest = snapshot["manifest"]
    return reference_rows(
        engine,
        slug=SLUG,
        up_to_round=snapshot["up_to_round"],
        max_step_id=manifest["cutoff"]["max_step_id"],
        max_label_id=manifest["cutoff"]["max_label_id"],
        action_space=manifest["action_space"],
    )


def test_manifest_counts_rows_per_round_and_source(client, discrete_loop, labeller, trainer):
    steps = _label_scenario(labeller)
    response = _create(client, trainer, up_to_round=1)
    assert response.status_code == 201, response.text
    body = response.json()
    manifest = body["manifest"]
    assert body["version"] == "v1" and body["created"] is True and body["row_count"] == 10
    # 6 demonstration steps, 1 takeover, relabels on steps[0], [3], [4] (hand-counted)
    assert manifest["rows_per_source"] == {"demonstration": 6, "takeover": 1, "relabel": 3}
    assert manifest["rows_per_round"] == {"0": 6, "1": 4}
    assert {"round": 1, "source": "relabel", "rows": 3} in manifest["rows_per_round_and_source"]
    assert manifest["unresolved_states"]["count"] == 2
    assert manifest["unresolved_states"]["step_ids"] == [steps[1], steps[2]]
    assert manifest["labelled_states"] == 5
    assert manifest["learner_versions"] == {"0": "demonstrations", "1": "pol-1"}
    assert manifest["action_space"]["actions"] == ["proceed", "creep", "hold"]
    assert [f["name"] for f in manifest["state_schema"]["features"]] == [
        "gap_m",
        "speed",
        "occluded",
    ]
    assert manifest["safety_caution"] == SAFETY_CAUTION
    assert manifest["created_by"] == "train-job" and manifest["created_at"]
    assert manifest["content_sha256"] == body["content_sha256"]


def test_round_and_source_tags_of_each_kind_of_row(
    client, engine, discrete_loop, labeller, trainer
):
    steps = _label_scenario(labeller)
    snapshot = _create(client, trainer, up_to_round=1).json()
    table = read_parquet(_export(client, trainer))
    rows = {r["step_id"]: r for r in table.to_pylist()}
    assert [rows[s]["source"] for s in range(1, 7)] == ["demonstration"] * 6
    assert {rows[s]["round"] for s in range(1, 7)} == {0}
    assert {rows[s]["learner_version"] for s in range(1, 7)} == {"demonstrations"}
    takeover = [r for r in rows.values() if r["source"] == "takeover"]
    assert len(takeover) == 1 and takeover[0]["round"] == 1 and takeover[0]["expert_action"] == 2
    assert takeover[0]["rollout"] == "run0" and takeover[0]["step"] == 4
    relabel = {s: rows[s] for s in (steps[0], steps[3], steps[4])}
    assert {r["source"] for r in relabel.values()} == {"relabel"}
    assert {r["learner_version"] for r in relabel.values()} == {"pol-1"}
    assert [relabel[s]["expert_action"] for s in (steps[0], steps[3], steps[4])] == [1, 2, 0]
    assert [relabel[s]["label_count"] for s in (steps[0], steps[3], steps[4])] == [3, 2, 1]
    assert relabel[steps[0]]["agreement"] == pytest.approx(2 / 3)
    assert steps[1] not in rows and steps[2] not in rows  # unresolved: left out
    assert as_tuples(table.to_pylist()) == as_tuples(_reference(engine, snapshot))


def test_same_content_returns_the_existing_version(client, discrete_loop, labeller, trainer):
    steps = _label_scenario(labeller)
    first = _create(client, trainer, up_to_round=1)
    again = _create(client, trainer, up_to_round=1)
    assert first.status_code == 201 and again.status_code == 200
    assert again.json()["created"] is False
    assert again.json()["version"] == "v1"
    assert again.json()["content_sha256"] == first.json()["content_sha256"]
    # without up_to_round: the newest round (1 here), so the same version again
    default = _create(client, trainer)
    assert default.status_code == 200 and default.json()["version"] == "v1"
    # a label that resolves the tie changes the content: a new version
    labeller.add(SLUG, steps[1], [None, None, 0])
    third = _create(client, trainer, up_to_round=1)
    assert third.status_code == 201 and third.json()["version"] == "v2"
    assert third.json()["row_count"] == 11
    assert third.json()["content_sha256"] != first.json()["content_sha256"]
    # up to round 0: demonstrations only, its own version
    demos = _create(client, trainer, up_to_round=0).json()
    assert demos["version"] == "v3" and demos["manifest"]["rows_per_source"]["demonstration"] == 6
    assert demos["row_count"] == 6
    listed = client.get(f"{BASE}/snapshots", headers=trainer).json()
    assert [s["version"] for s in listed["items"]] == ["v3", "v2", "v1"] and listed["total"] == 3
    latest = client.get(f"{BASE}/snapshots/latest", headers=trainer).json()
    assert latest["version"] == "v3"


def test_version_is_immutable_after_more_labels_and_uploads(
    client, engine, discrete_loop, labeller, trainer, admin, uploader
):
    steps = _label_scenario(labeller)
    created = _create(client, trainer, up_to_round=1).json()
    before = {fmt: _export(client, trainer, format=fmt) for fmt in ("parquet", "npz", "jsonl")}
    # re-exports are byte-identical
    for fmt, content in before.items():
        assert _export(client, trainer, format=fmt) == content, fmt
    # more labels on round 1, another rollout with a takeover in round 1, and a round 2
    labeller.add(SLUG, steps[1], [None, None, 0])
    labeller.add(SLUG, steps[5], [2])
    upload(client, uploader, SLUG, 1, LATE_ROLLOUT)
    client.post(f"{BASE}/rounds", json={"learner_version": "pol-2"}, headers=admin)
    for fmt, content in before.items():
        assert hashlib.sha256(_export(client, trainer, format=fmt)).digest() == (
            hashlib.sha256(content).digest()
        ), f"v1 as {fmt} changed after later labels and uploads"
    again = client.get(f"{BASE}/snapshots/v1", headers=trainer).json()
    assert again["manifest"] == created["manifest"]
    newer = _create(client, trainer, up_to_round=1).json()
    assert newer["version"] == "v2" and newer["row_count"] == created["row_count"] + 3


def test_content_hash_matches_a_row_by_row_reference(
    client, engine, discrete_loop, labeller, trainer
):
    _label_scenario(labeller)
    snapshot = _create(client, trainer, up_to_round=1).json()
    rows = _reference(engine, snapshot)
    loop = loop_row(engine, SLUG)
    expected = reference_hash(rows, n_features=3, discrete=True, width=3)
    assert loop["slug"] == SLUG
    assert snapshot["content_sha256"] == expected
    assert snapshot["row_count"] == len(rows)


def test_same_content_hash_on_a_second_store(
    client, discrete_loop, labeller, trainer, tmp_path: Path, make_user
):
    """The suite's store (SQLite, or PostgreSQL when configured) against a fresh SQLite store
    built by the same requests: identical hashes, rows and Parquet bytes."""
    _label_scenario(labeller)
    here = _create(client, trainer, up_to_round=1).json()
    url = f"sqlite:///{tmp_path / 'second.db'}"
    upgrade(url)
    second_app = create_app(Settings(data_dir=tmp_path / "second", database_url=url))
    from expertloop.auth import service as auth_service

    with second_app.state.session_factory.begin() as session:
        headers = {}
        for name, role in (("root-admin", "admin"), ("fleet-uploader", "uploader")):
            user = auth_service.create_user(session, name=name, roles=[role])
            headers[role] = {
                "Authorization": f"Bearer {auth_service.issue_token(session, user=user)}"
            }
    with TestClient(second_app) as other:
        build_discrete(other, headers["admin"], headers["uploader"])
        _label_scenario(Labeller(second_app))
        there = _create(other, headers["admin"], up_to_round=1).json()
        there_parquet = _export(other, headers["admin"])
    assert there["content_sha256"] == here["content_sha256"]
    assert there["row_count"] == here["row_count"]
    assert (
        read_parquet(there_parquet).to_pylist()
        == read_parquet(_export(client, trainer)).to_pylist()
    )
    assert (
        there["manifest"]["rows_per_round_and_source"]
        == here["manifest"]["rows_per_round_and_source"]
    )


def test_trainer_exports_annotator_and_uploader_cannot(
    client, discrete_loop, trainer, annotator, uploader, engine
):
    assert _create(client, trainer).status_code == 201
    assert client.get(f"{BASE}/snapshots/v1/export", headers=trainer).status_code == 200
    before = store_contents(engine)
    for headers in (annotator, uploader):
        refused = client.get(f"{BASE}/snapshots/v1/export", headers=headers)
        assert refused.status_code == 403
        assert "trainer" in refused.json()["detail"]
        assert _create(client, headers).status_code == 403
    assert store_contents(engine) == before


@pytest.mark.parametrize(
    ("method", "path", "body", "status", "words"),
    [
        ("GET", "/snapshots/v1/export?format=csv", None, 422, "format"),
        ("GET", "/snapshots/v9/export", None, 404, "v9"),
        ("GET", "/snapshots/version-one/export", None, 422, "version"),
        ("GET", "/snapshots/v1/export?since=v2", None, 422, "since=v2"),
        ("GET", "/snapshots/v1/export?since=v7", None, 404, "v7"),
        ("GET", "/snapshots/v3", None, 404, "v3"),
        ("POST", "/snapshots", {"up_to_round": 5}, 404, "round 5"),
        ("POST", "/snapshots", {"up_to_round": -1}, 422, "up_to_round"),
        ("POST", "/snapshots", {"up_to_round": 1, "extra": 1}, 422, "extra"),
    ],
)
def test_bad_requests_name_the_problem_and_change_nothing(
    client, discrete_loop, trainer, engine, method, path, body, status, words
):
    assert _create(client, trainer, up_to_round=0).status_code == 201
    assert _create(client, trainer, up_to_round=1).status_code == 201
    before = store_contents(engine)
    response = client.request(method, BASE + path, json=body, headers=trainer)
    assert response.status_code == status, response.text
    assert words in response.json()["detail"]
    assert store_contents(engine) == before


def test_nothing_to_snapshot_and_unknown_loop(client, admin, trainer, engine):
    from tests.helpers import DISCRETE_SPEC

    client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    before = store_contents(engine)
    empty = _create(client, trainer)
    assert empty.status_code == 422 and "nothing to snapshot" in empty.json()["detail"]
    missing = client.post("/api/loops/no-such-loop/snapshots", json={}, headers=trainer)
    assert missing.status_code == 404 and "no-such-loop" in missing.json()["detail"]
    latest = client.get(f"{BASE}/snapshots/latest", headers=trainer)
    assert latest.status_code == 404 and "no snapshots yet" in latest.json()["detail"]
    assert store_contents(engine) == before
