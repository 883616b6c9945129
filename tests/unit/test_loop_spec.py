"""The typed loop spec (app/loops/spec.py): widths, bounds, tolerances and settings with their
defaults, parsed once per stored row; and no stage outside app/loops reading the stored JSON by
key instead."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest
from pydantic import ValidationError
from sqlalchemy import text

from expertloop.loops import service as loops_service
from expertloop.loops.schemas import LoopSettings
from expertloop.loops.spec import DEFAULT_TOLERANCE_FRACTION, parse_spec, spec_of
from expertloop.sampler.service import rank_params
from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC

APP = Path(__file__).resolve().parents[2] / "app"

# Settings as a loop created before the later settings were added stores them: no
# uncertainty_method, self_tuning, tuning_min_disagreements, key_features, continuous_start,
# context_commands or continuous_tolerance.
EARLY_SETTINGS = {
    "labels_per_state": 2,
    "lease_seconds": 120,
    "show_learner_fraction": 0.5,
    "span_labels": False,
    "span_max_steps": 10,
    "context_seconds": 4.0,
    "uncertainty_weight": 0.7,
    "novelty_weight": 0.3,
    "novelty_k": 10,
    "min_gap_steps": 10,
    "audit_fraction": 0.1,
    "spread": False,
    "takeover_window_s": 3.0,
    "takeover_boost": 0.25,
}


def discrete():
    return parse_spec(DISCRETE_SPEC["features"], DISCRETE_SPEC["action_space"])


def continuous(settings=None):
    return parse_spec(CONTINUOUS_SPEC["features"], CONTINUOUS_SPEC["action_space"], settings)


def test_discrete_widths_and_names():
    spec = discrete()
    assert spec.is_discrete and spec.kind == "discrete"
    assert spec.action_width == 3 and spec.action_names == ("proceed", "creep", "hold")
    assert spec.n_features == 3 and spec.feature_names == ("gap_m", "speed", "occluded")
    assert spec.feature_units == ("m", "m/s", "")
    assert spec.action_units == ()
    assert spec.low.shape == spec.high.shape == spec.tolerance.shape == (0,)
    assert spec.action_name(2) == "hold"
    assert spec.action_name(None) is None and spec.action_name(True) is None


def test_continuous_widths_bounds_and_default_tolerance():
    spec = continuous()
    assert not spec.is_discrete and spec.kind == "continuous"
    assert spec.action_width == 2 and spec.action_names == ("speed_cmd", "curvature")
    assert spec.action_units == ("m/s", "1/m")
    np.testing.assert_array_equal(spec.low, [0.0, -0.2])
    np.testing.assert_array_equal(spec.high, [2.0, 0.2])
    assert spec.low.dtype == spec.high.dtype == np.float64
    # the default is a tenth of each range (README, loop settings: continuous_tolerance)
    assert DEFAULT_TOLERANCE_FRACTION == 0.1
    np.testing.assert_allclose(spec.tolerance, [0.2, 0.04])
    assert spec.action_name([1.0, 0.1]) is None


def test_a_chosen_tolerance_replaces_the_default():
    spec = continuous({"continuous_tolerance": [0.5, 0.01]})
    np.testing.assert_array_equal(spec.tolerance, [0.5, 0.01])


def test_the_arrays_are_read_only():
    # one spec is shared by everyone who reads the same row: nobody may change it in place
    spec = continuous()
    for values in (spec.low, spec.high, spec.tolerance):
        with pytest.raises(ValueError, match="read-only"):
            values[0] = 9.0


def test_settings_missing_from_the_stored_json_take_their_defaults():
    spec = continuous(EARLY_SETTINGS)
    defaults = LoopSettings()
    assert spec.settings.lease_seconds == 120 and spec.settings.uncertainty_weight == 0.7
    assert spec.settings.self_tuning is defaults.self_tuning is True
    assert spec.settings.uncertainty_method == defaults.uncertainty_method == "auto"
    assert spec.settings.tuning_min_disagreements == defaults.tuning_min_disagreements == 10
    assert spec.settings.continuous_start == "neutral"
    assert spec.settings.context_commands == "expert"
    assert spec.settings.key_features is None
    np.testing.assert_allclose(spec.tolerance, [0.2, 0.04])
    assert discrete().settings == defaults  # no settings stored at all


def test_a_spec_that_is_not_valid_is_refused():
    with pytest.raises(ValidationError):
        parse_spec(DISCRETE_SPEC["features"], {"kind": "discrete", "actions": ["only"]})
    with pytest.raises(ValidationError):
        parse_spec(DISCRETE_SPEC["features"], DISCRETE_SPEC["action_space"], {"min_gap_s": 1.0})


def test_a_stored_loop_with_early_settings_reads_with_defaults(app, client, admin, engine):
    created = client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    assert created.status_code == 201, created.text
    with engine.begin() as conn:  # the row as an early version of the service stored it
        conn.execute(
            text("UPDATE loops SET settings = :settings WHERE slug = :slug"),
            {"settings": json.dumps(EARLY_SETTINGS), "slug": DISCRETE_SPEC["slug"]},
        )
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=DISCRETE_SPEC["slug"])
        spec = spec_of(loop)
        assert spec.settings.labels_per_state == 2 and spec.settings.self_tuning is True
        params = rank_params(loop, budget=5, seed=1)
        assert params.self_tuning is True and params.uncertainty_method == "auto"
        assert params.tuning_min_disagreements == 10 and params.uncertainty_weight == 0.7
        assert params.search_by_candidates is True  # new jobs take the measured search choice
    read = client.get(f"/api/loops/{DISCRETE_SPEC['slug']}", headers=admin)
    assert read.status_code == 200
    assert read.json()["settings"]["self_tuning"] is True


def test_the_spec_is_parsed_once_per_row_until_its_json_changes(app, client, admin):
    assert client.post("/api/loops", json=CONTINUOUS_SPEC, headers=admin).status_code == 201
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=CONTINUOUS_SPEC["slug"])
        first = spec_of(loop)
        assert spec_of(loop) is first
        loop.settings = {**loop.settings, "continuous_tolerance": [0.5, 0.01]}
        changed = spec_of(loop)
        assert changed is not first
        np.testing.assert_array_equal(changed.tolerance, [0.5, 0.01])
        session.rollback()


# Reading the stored spec JSON by key outside app/loops would bypass the typed spec (and its
# defaults). Writing the stored JSON out whole (the export manifest, the bench's config, the
# report fingerprint) is not a read by key and stays allowed.
RAW_READS = re.compile(
    r"\.settings\[|\.settings\.get\(|action_space\[|action_space\.get\("
    r"|(?<=[\w\])])\[\"(kind|actions|dimensions|low|high)\"\]"
)


def test_no_stage_reads_the_stored_spec_by_key():
    found = []
    for path in sorted(APP.rglob("*.py")):
        if path.parent.name == "loops" and path.parent.parent == APP:
            continue
        for number, line in enumerate(path.read_text().splitlines(), 1):
            if RAW_READS.search(line):
                found.append(f"{path.relative_to(APP.parent)}:{number}: {line.strip()}")
    assert not found, "read the typed spec (app/loops/spec.py) instead:\n" + "\n".join(found)
