"""Tests of the demo scenario's simulator, scripted expert, learner and files (invented world)."""

from __future__ import annotations

import json
import re

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy.integrate import solve_ivp

from expertloop.demo import expert, files, learner, sim
from expertloop.demo import scenario as sc

CONTRACT_COLUMNS = {
    "rollout", "step", "time_s", "features", "control", "learner_action", "learner_probs",
    "learner_ensemble", "expert_action", "robot", "scene", "image",
}  # fmt: skip
F = sc.FEATURE_INDEX


def _one_crossing_world(agent_kind: int, lead_time_s: float, occluded: bool = False) -> sim.World:
    """One rollout, one crossing 30 m ahead, cruise speed, no lateral error, no load."""

    def one(value: float) -> np.ndarray:
        return np.array([value])

    def grid(value: float) -> np.ndarray:
        return np.array([[value]])

    return sim.World(
        load_mass=one(0.0),
        train_length=one(7.5),
        crossing_pos=grid(30.0),
        occluded=np.array([[occluded]]),
        agent_kind=np.array([[agent_kind]], dtype=np.int64),
        agent_speed=grid(1.2),
        agent_lead_time=grid(lead_time_s),
        agent_side=grid(1.0),
        curvature_bias=one(0.0),
        initial_speed=one(sc.V_CRUISE),
        initial_offset=one(0.0),
        initial_heading=one(0.0),
    )


def _fit_on_demonstrations(kind: str, n_rollouts: int, seed: int) -> learner.Ensemble:
    demo = sim.rollout(None, n_rollouts, seed, kind=kind, with_scene=False)
    rng = np.random.default_rng(seed)
    return learner.fit(demo.columns["features"], demo.columns["expert_action"], kind, rng)


# --- loop specs --------------------------------------------------------------------------------


@pytest.mark.parametrize("kind", ["discrete", "continuous"])
def test_loop_spec_follows_the_service_format(kind: str) -> None:
    spec = json.loads(json.dumps(sc.loop_spec(kind)))  # JSON-ready
    names = [f["name"] for f in spec["features"]]
    assert names == list(sc.FEATURE_NAMES) and len(names) == sc.N_FEATURES
    assert all(re.fullmatch(r"[a-z][a-z0-9_]*", name) for name in names)
    assert not set(names) & CONTRACT_COLUMNS
    assert all(f["unit"] for f in spec["features"])
    assert spec["action_space"]["kind"] == kind
    assert "invented" in spec["title"]
    if kind == "discrete":
        assert spec["action_space"]["actions"] == ["proceed", "creep", "hold"]
    else:
        dims = spec["action_space"]["dimensions"]
        assert [(d["name"], d["low"], d["high"]) for d in dims] == [
            ("speed_cmd", 0.0, 2.0),
            ("curvature", -0.2, 0.2),
        ]


# --- simulator ---------------------------------------------------------------------------------


def test_same_seed_gives_the_same_rollouts_and_another_seed_does_not() -> None:
    a = sim.rollout(None, 3, 5, kind="discrete")
    b = sim.rollout(None, 3, 5, kind="discrete")
    assert a.columns.keys() == b.columns.keys()
    for name in a.columns:
        np.testing.assert_array_equal(a.columns[name], b.columns[name])
    assert a.measures == b.measures
    c = sim.rollout(None, 3, 6, kind="discrete")
    assert a.columns["features"].shape != c.columns["features"].shape or not np.array_equal(
        a.columns["features"], c.columns["features"]
    )


def test_rows_have_the_contract_shape() -> None:
    result = sim.rollout(None, 4, 9, kind="discrete")
    cols = result.columns
    n = len(cols["step"])
    assert cols["features"].shape == (n, sc.N_FEATURES) and cols["features"].dtype == np.float32
    assert np.all(np.isfinite(cols["features"]))
    assert set(cols["control"]) == {"expert"}
    for key in np.unique(cols["rollout"]):
        rows = cols["rollout"] == key
        np.testing.assert_array_equal(cols["step"][rows], np.arange(rows.sum()))
        assert np.all(np.diff(cols["time_s"][rows]) > 0)
    scene = json.loads(cols["scene"][n // 2])
    assert scene["frame"] == "robot"
    kinds = {agent["kind"] for s in cols["scene"] for agent in json.loads(s)["agents"]}
    assert kinds <= {"pedestrian", "forklift", "rack", "cart"}
    assert {"cart", "rack"} <= kinds


def test_time_to_cover_matches_numerical_integration() -> None:
    # Reference: scipy's ODE solver on x' = v, v' = a until V_CRUISE, stopped by an event at x = d.
    for distance, speed, accel in [(10.0, 0.0, 0.5), (1.0, 0.3, 0.9), (25.0, 1.9, 0.4), (3, 2, 1)]:

        def motion(t: float, y: np.ndarray, a: float = accel) -> list[float]:
            return [y[1], a if y[1] < sc.V_CRUISE else 0.0]

        def arrived(t: float, y: np.ndarray, d: float = distance) -> float:
            return y[0] - d

        arrived.terminal = True  # type: ignore[attr-defined]
        ref = solve_ivp(motion, (0, 100), [0.0, speed], events=arrived, max_step=0.001)
        got = sc.time_to_cover(np.array([distance]), np.array([speed]), np.array([accel]))[0]
        assert got == pytest.approx(ref.t_events[0][0], abs=2e-3)


def test_crossing_time_at_cruise_is_distance_over_speed() -> None:
    # Constant-speed kinematics (common practice): from APPROACH_M before the centre until the
    # tail leaves the zone, the train covers APPROACH_M + half zone + train length. Both ends
    # are detected at the first 0.1 s step after they happen, so the difference is within a step.
    world = _one_crossing_world(agent_kind=0, lead_time_s=5.0)
    result = sim.simulate(world, expert.always_proceed("discrete"), np.random.default_rng(0),
                          kind="discrete")  # fmt: skip
    expected = (sc.APPROACH_M + sc.SIDE_AISLE_HALF_WIDTH + 7.5) / sc.V_CRUISE
    assert abs(result.measures["mean_crossing_time_s"] - expected) < sc.DT_S + 1e-9
    assert result.measures["conflicts"] == 0 and result.measures["crossings"] == 1


def test_agent_in_the_zone_with_the_train_is_a_conflict_and_the_expert_avoids_it() -> None:
    # At cruise the front reaches the zone (22 - 1.5) / 2 = 10.25 s after the agent starts;
    # an agent due in the zone after 10 s is in it while the train passes.
    world = _one_crossing_world(agent_kind=1, lead_time_s=10.0)
    naive = sim.simulate(world, expert.always_proceed("discrete"), np.random.default_rng(0),
                         kind="discrete")  # fmt: skip
    assert naive.measures["conflicts"] == 1
    for kind in ["discrete", "continuous"]:
        careful = sim.simulate(world, None, np.random.default_rng(0), kind=kind)
        assert careful.measures["conflicts"] == 0 and careful.measures["crossings"] == 1
        if kind == "discrete":
            assert np.any(careful.columns["expert_action"] == sc.HOLD)


def test_occluded_agents_are_seen_only_close_by() -> None:
    result = sim.rollout(None, 30, 21, kind="discrete", with_scene=False)
    x = result.columns["features"]
    occluded_and_seen = (x[:, F["occluded"]] == 1) & (x[:, F["agent_present"]] == 1)
    assert np.all(x[occluded_and_seen, F["agent_dist_to_path"]] <= sc.REVEAL_AGENT_DISTANCE_M)
    # The expert creeps at occluded crossings, so creep shows up in demonstrations.
    assert np.any(result.columns["expert_action"] == sc.CREEP)


@pytest.mark.parametrize("kind", ["discrete", "continuous"])
def test_expert_has_far_fewer_conflicts_than_always_proceed(kind: str) -> None:
    expert_run = sim.rollout(None, 60, 11, kind=kind, with_scene=False)
    naive_run = sim.rollout(expert.always_proceed(kind), 60, 11, kind=kind, with_scene=False)
    expert_rate = expert_run.measures["conflicts_per_100_crossings"]
    naive_rate = naive_run.measures["conflicts_per_100_crossings"]
    assert naive_rate > 15.0  # the scenario is not trivially safe
    assert expert_rate * 5 < naive_rate
    assert expert_run.measures["stalled_rollouts"] == 0
    # Being careful costs time: the expert crosses more slowly.
    assert expert_run.measures["mean_crossing_time_s"] > naive_run.measures["mean_crossing_time_s"]


@pytest.mark.slow  # about 10-20 s: five seeds, each a fit and three 60-rollout runs
@pytest.mark.parametrize("kind", ["discrete", "continuous"])
def test_learner_from_few_demonstrations_is_between_expert_and_always_proceed(kind: str) -> None:
    between = 0
    for seed in range(5):
        ens = _fit_on_demonstrations(kind, n_rollouts=4, seed=100 + seed)
        rates = [
            sim.rollout(policy, 60, 900 + seed, kind=kind, with_scene=False).measures[
                "conflicts_per_100_crossings"
            ]
            for policy in (None, ens, expert.always_proceed(kind))
        ]
        between += int(rates[0] < rates[1] < rates[2])
    assert between >= 4


# --- learner -----------------------------------------------------------------------------------


def test_ensemble_members_are_the_fitted_sklearn_models() -> None:
    ens = _fit_on_demonstrations("discrete", n_rollouts=2, seed=3)
    x = sim.rollout(None, 1, 4, kind="discrete", with_scene=False).columns["features"]
    out = ens.predict(x)
    assert out.ensemble is not None and out.probs is not None
    assert out.ensemble.shape == (len(x), learner.N_MEMBERS, len(sc.DISCRETE_ACTIONS))
    z = (x - ens.feature_mean) / ens.feature_scale
    for m, member in enumerate(ens.members):
        # Reference: scikit-learn's own predict_proba, placed in the member's class columns.
        np.testing.assert_allclose(out.ensemble[:, m, member.classes_], member.predict_proba(z))
    np.testing.assert_allclose(out.probs, out.ensemble.mean(axis=1))
    np.testing.assert_allclose(out.probs.sum(axis=1), 1.0)
    np.testing.assert_array_equal(out.action, out.probs.argmax(axis=1))
    # Bootstrap members differ from one another.
    assert np.ptp(out.ensemble, axis=1).max() > 0
    again = _fit_on_demonstrations("discrete", n_rollouts=2, seed=3).predict(x)
    np.testing.assert_array_equal(out.ensemble, again.ensemble)


def test_continuous_ensemble_stays_within_bounds() -> None:
    ens = _fit_on_demonstrations("continuous", n_rollouts=2, seed=3)
    x = sim.rollout(expert.always_proceed("continuous"), 2, 8, kind="continuous",
                    with_scene=False).columns["features"]  # fmt: skip
    out = ens.predict(x)
    assert out.action.shape == (len(x), 2) and out.probs is None
    assert out.ensemble is not None and out.ensemble.shape == (len(x), learner.N_MEMBERS, 2)
    assert np.all(out.ensemble[..., 0] >= 0) and np.all(out.ensemble[..., 0] <= 2)
    assert np.all(np.abs(out.ensemble[..., 1]) <= 0.2)
    np.testing.assert_allclose(out.action, out.ensemble.mean(axis=1))


def test_fit_refuses_bad_input() -> None:
    rng = np.random.default_rng(0)
    x = rng.standard_normal((20, sc.N_FEATURES))
    with pytest.raises(ValueError):
        learner.fit(x, np.zeros(19, dtype=int), "discrete", rng)
    with pytest.raises(ValueError):
        learner.fit(x, np.full(20, 3), "discrete", rng)
    with pytest.raises(ValueError):
        learner.fit(x, np.zeros((20, 2)), "sideways", rng)


# --- files -------------------------------------------------------------------------------------


@pytest.mark.parametrize("kind", ["discrete", "continuous"])
def test_rollout_files_round_trip_through_parquet_and_jsonl(kind: str, tmp_path) -> None:
    ens = _fit_on_demonstrations(kind, n_rollouts=2, seed=12)
    result = sim.rollout(ens, 3, 13, kind=kind, takeover=True, key_prefix="r1")
    table = files.to_table(result)
    path = tmp_path / "rollouts.parquet"
    files.write_parquet(table, path)
    back = pq.read_table(path)
    assert back.equals(table)
    assert back.schema.field("features").type == pa.list_(pa.float32())
    features = np.asarray(back["features"].combine_chunks().flatten()).reshape(-1, sc.N_FEATURES)
    np.testing.assert_array_equal(features, result.columns["features"])
    control = np.asarray(back["control"].to_pylist())
    expert_action = back["expert_action"].to_pylist()
    assert all((a is None) == (c == "learner") for a, c in zip(expert_action, control, strict=True))
    ensemble = back["learner_ensemble"].to_pylist()
    width = len(sc.DISCRETE_ACTIONS) if kind == "discrete" else 2
    assert all(len(e) == learner.N_MEMBERS and all(len(m) == width for m in e) for e in ensemble)
    if kind == "discrete":
        assert set(back["learner_action"].to_pylist()) <= set(sc.DISCRETE_ACTIONS)
        assert all(len(p) == width for p in back["learner_probs"].to_pylist())
    else:
        assert "learner_probs" not in back.column_names

    lines = files.jsonl_lines(table)
    assert len(lines) == table.num_rows
    rows = [json.loads(line) for line in lines]
    assert list(rows[0]) == table.column_names
    parsed = np.asarray([r["features"] for r in rows], dtype=np.float32)
    np.testing.assert_array_equal(parsed, result.columns["features"])  # shortest float32 form
    files.write_jsonl(table.slice(0, 4), tmp_path / "example.jsonl")
    text = (tmp_path / "example.jsonl").read_text(encoding="utf-8").splitlines()
    assert [json.loads(line)["step"] for line in text] == [0, 1, 2, 3]


def test_demonstration_file_has_no_learner_columns() -> None:
    table = files.to_table(sim.rollout(None, 2, 1, kind="discrete"))
    assert not {"learner_action", "learner_probs", "learner_ensemble"} & set(table.column_names)
    assert table["expert_action"].null_count == 0
    assert set(table["control"].to_pylist()) == {"expert"}
    assert b"Invented" in table.schema.metadata[b"expertloop.demo"]
