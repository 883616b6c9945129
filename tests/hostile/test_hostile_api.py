"""Hostile requests to the JSON API: integers beyond the store's columns, loose types,
non-finite numbers, control characters and huge values. Each is a 422 naming the field."""

from __future__ import annotations

import pytest

from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC

BIG32 = 3_000_000_000  # beyond PostgreSQL's INTEGER
BIG64 = 10**20  # beyond any 64-bit integer column


@pytest.mark.parametrize(
    ("path", "names"),
    [
        (f"/api/jobs/{BIG32}", "job_id"),
        ("/api/jobs/-1", "job_id"),
        (f"/api/jobs/{BIG64}", "job_id"),
        (f"/api/loops/aisle-crossing/rounds/{BIG32}/rollouts", "number"),
        ("/api/loops/aisle-crossing/rounds/-1/rollouts", "number"),
        (f"/api/loops/aisle-crossing/rounds/{BIG64}/report", "number"),
        (f"/api/loops/aisle-crossing/rounds/{BIG32}/selection", "number"),
        (f"/api/loops/aisle-crossing/rounds/{BIG32}/queue", "number"),
        (f"/api/loops/aisle-crossing/states/{BIG64}", "step_id"),
        (f"/api/loops/aisle-crossing/rounds/1/rollouts?offset={BIG32}", "offset"),
        (f"/api/loops/aisle-crossing/rollouts/r0/steps?offset={BIG64}", "offset"),
        ("/api/loops/aisle-crossing/rounds/1/rollouts?limit=1e3", "limit"),
        ("/api/loops/aisle-crossing/states/1?seconds=nan", "seconds.*finite"),
        ("/api/loops/aisle-crossing/states/1?seconds=inf", "seconds.*finite"),
        ("/api/loops/aisle%00crossing", "control character"),
        ("/api/loops/aisle-crossing/rollouts/r%000/steps", "control character"),
        ("/api/loops/aisle-crossing/snapshots/v1/export?since=v%1b1", "control character"),
    ],
)
def test_out_of_range_addresses_are_422(refused, client, loops, admin, path, names):
    refused(lambda: client.get(path, headers=admin), 422, names)


@pytest.mark.parametrize(
    ("path", "body", "names"),
    [
        ("/api/loops/aisle-crossing/snapshots", {"up_to_round": BIG32}, "up_to_round"),
        ("/api/loops/aisle-crossing/snapshots", {"up_to_round": BIG64}, "up_to_round"),
        ("/api/loops/aisle-crossing/snapshots", {"up_to_round": False}, "up_to_round"),
        ("/api/loops/aisle-crossing/snapshots", {"up_to_round": "1"}, "up_to_round"),
        ("/api/loops/aisle-crossing/snapshots", {"up_to_round": 1.5}, "up_to_round"),
        ("/api/loops/aisle-crossing/rounds/1/ranking", {"budget": "10"}, "budget"),
        ("/api/loops/aisle-crossing/rounds/1/ranking", {"budget": True}, "budget"),
        ("/api/loops/aisle-crossing/rounds/1/ranking", {"budget": 10.5}, "budget"),
        ("/api/loops/aisle-crossing/rounds/1/ranking", {"budget": 5, "seed": 2**64}, "seed"),
        ("/api/loops/aisle-crossing/rounds/1/ranking", {"budget": 5, "extra": 1}, "extra"),
        ("/api/loops/aisle-crossing/rounds", {"learner_version": "v\x002"}, "learner_version"),
        ("/api/loops/aisle-crossing/rounds", {"learner_version": "v\u202e2"}, "U\\+202E"),
        ("/api/loops/aisle-crossing/rounds", {"learner_version": "x" * 1_000_000}, "200"),
        ("/api/loops/aisle-crossing/rounds", {"learner_version": 7}, "learner_version"),
        (f"/api/loops/aisle-crossing/queue/items/{BIG32}/renew", None, "item_id"),
        (f"/api/loops/aisle-crossing/rounds/{BIG32}/close", None, "number"),
    ],
)
def test_out_of_range_and_loosely_typed_bodies_are_422(
    refused, client, loops, admin, path, body, names
):
    refused(lambda: client.post(path, json=body, headers=admin), 422, names)


def test_label_with_a_huge_span_or_id_is_422(refused, client, loops, make_user):
    annotator = make_user("annotator", name="ann")
    body = {"submission_id": "s1", "answer": "action", "action": 0, "span_steps": BIG32}
    url = "/api/loops/aisle-crossing/queue/items/1/labels"
    refused(lambda: client.post(url, json=body, headers=annotator), 422, "span_steps")
    body = {"submission_id": "s\x00", "answer": "unsure"}
    refused(lambda: client.post(url, json=body, headers=annotator), 422, "submission_id")
    raw = '{"submission_id": "s3", "answer": "unsure", "seconds_spent": Infinity}'
    refused(
        lambda: client.post(
            url, content=raw, headers={**annotator, "content-type": "application/json"}
        ),
        422,
        "seconds_spent",
    )


def _loop_json(spec: dict, **replace: str) -> str:
    """The spec as JSON text with raw tokens (Infinity, NaN) put in by placeholder."""
    import json

    text = json.dumps(spec)
    for placeholder, token in replace.items():
        text = text.replace(f'"{placeholder}"', token)
    return text


@pytest.mark.parametrize(
    ("spec", "names"),
    [
        ({**DISCRETE_SPEC, "slug": "s1", "settings": {"context_seconds": "@INF"}}, "context"),
        ({**DISCRETE_SPEC, "slug": "s2", "settings": {"min_gap_s": "@NAN"}}, "min_gap_s"),
        ({**DISCRETE_SPEC, "slug": "s3", "settings": {"uncertainty_weight": "@INF"}}, "weight"),
        ({**DISCRETE_SPEC, "slug": "s4", "settings": {"labels_per_state": "2"}}, "labels_per"),
        ({**DISCRETE_SPEC, "slug": "s5", "settings": {"spread": 1}}, "spread"),
        ({**DISCRETE_SPEC, "slug": "s6", "settings": {"novelty_k": BIG32}}, "novelty_k"),
        ({**DISCRETE_SPEC, "slug": "s7", "title": "t\x00"}, "title"),
        (
            {
                **CONTINUOUS_SPEC,
                "slug": "s8",
                "action_space": {
                    "kind": "continuous",
                    "dimensions": [{"name": "v", "low": 0, "high": "@INF"}],
                },
            },
            "high",
        ),
        (
            {
                **CONTINUOUS_SPEC,
                "slug": "s9",
                "action_space": {
                    "kind": "continuous",
                    "dimensions": [{"name": "v", "low": "@MINF", "high": 1}],
                },
            },
            "low",
        ),
        (
            {
                **CONTINUOUS_SPEC,
                "slug": "s10",
                "settings": {"continuous_tolerance": ["@NAN", 0.1]},
            },
            "continuous_tolerance",
        ),
        ({**DISCRETE_SPEC, "slug": "s11", "features": [{"name": "a", "unit": "m\x1b"}]}, "unit"),
    ],
)
def test_loop_specs_with_non_finite_or_loose_values_are_422(refused, client, admin, spec, names):
    raw = _loop_json(spec, **{"@INF": "Infinity", "@NAN": "NaN", "@MINF": "-Infinity"})
    refused(
        lambda: client.post(
            "/api/loops", content=raw, headers={**admin, "content-type": "application/json"}
        ),
        422,
        names,
    )


def test_timestamps_carry_their_zone_on_every_backend(client, loops, admin):
    loop = client.get("/api/loops/aisle-crossing", headers=admin).json()
    rounds = client.get("/api/loops/aisle-crossing/rounds", headers=admin).json()["items"]
    for stamp in (loop["created_at"], rounds[-1]["opened_at"]):
        assert stamp.endswith(("Z", "+00:00")), stamp
