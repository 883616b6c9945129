"""Seeded simulator of the demo scenario at 10 Hz (invented world; see app.demo.scenario).

Many rollouts run side by side as numpy arrays. A rollout drives one tractor past
N_CROSSINGS crossings; each step records the features the policy saw, the action applied and who
was in control. The world of a rollout (crossings, loads, agents, noise) depends only on the
seed, not on the policy, so policies compared with the same seed meet the same situations.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from . import expert
from . import scenario as sc

FloatArray = NDArray[np.float64]
Policy = Callable[[NDArray[Any]], sc.PolicyOutput]


@dataclass(frozen=True)
class World:
    """Everything random about a batch of rollouts except the per-step noise.

    Arrays have shape (n,) per rollout or (n, C) per rollout and crossing. ``agent_kind`` 0 means
    no agent crosses there; ``agent_lead_time`` is the agent's time to reach the zone, counted
    from when the tractor's front is AGENT_TRIGGER_M before the crossing; ``agent_side`` is +1
    for an agent coming from the tractor's left.
    """

    load_mass: FloatArray
    train_length: FloatArray
    crossing_pos: FloatArray
    occluded: NDArray[np.bool_]
    agent_kind: NDArray[np.int64]
    agent_speed: FloatArray
    agent_lead_time: FloatArray
    agent_side: FloatArray
    curvature_bias: FloatArray
    initial_speed: FloatArray
    initial_offset: FloatArray
    initial_heading: FloatArray


@dataclass(frozen=True)
class RolloutResult:
    """Rollout rows in the file contract's shape, plus closed-loop measures.

    ``columns`` holds, one entry per step (n_rows rows, sorted by rollout then step):
    rollout (str), step (int64), time_s (float64), features (n_rows, d) float32, control
    ("learner"/"expert"), robot (str), scene (JSON str, when asked for), expert_action (discrete:
    int64 index; continuous: (n_rows, D) float64) for EVERY row (the files keep it only where the
    expert was in control), and when a learner drove: learner_action, learner_probs (discrete,
    (n_rows, K)), learner_ensemble ((n_rows, M, K) or (n_rows, M, D)).
    """

    kind: str
    columns: dict[str, NDArray[Any]]
    measures: dict[str, float]


def sample_world(n_rollouts: int, rng: np.random.Generator) -> World:
    """Draw the invented world of ``n_rollouts`` rollouts."""
    n, c = n_rollouts, sc.N_CROSSINGS
    spacing = rng.uniform(*sc.CROSSING_SPACING_M, size=(n, c - 1))
    first = np.full((n, 1), sc.FIRST_CROSSING_M)
    has_agent = rng.random((n, c)) < sc.AGENT_SHARE
    pedestrian = rng.random((n, c)) < sc.PEDESTRIAN_SHARE
    speed = np.where(
        pedestrian,
        rng.uniform(*sc.PEDESTRIAN_SPEED, size=(n, c)),
        rng.uniform(*sc.FORKLIFT_SPEED, size=(n, c)),
    )
    carts = rng.integers(sc.CARTS_RANGE[0], sc.CARTS_RANGE[1] + 1, size=n)
    return World(
        load_mass=rng.uniform(*sc.LOAD_RANGE_KG, size=n),
        train_length=(sc.TRACTOR_LENGTH_M + sc.CART_LENGTH_M * carts).astype(np.float64),
        crossing_pos=np.cumsum(np.hstack([first, spacing]), axis=1),
        occluded=rng.random((n, c)) < sc.OCCLUDED_SHARE,
        agent_kind=np.where(has_agent, np.where(pedestrian, 1, 2), 0).astype(np.int64),
        agent_speed=speed,
        agent_lead_time=rng.uniform(*sc.AGENT_LEAD_TIME_S, size=(n, c)),
        agent_side=np.where(rng.random((n, c)) < 0.5, 1.0, -1.0),
        curvature_bias=rng.uniform(-sc.CURVATURE_BIAS, sc.CURVATURE_BIAS, size=n),
        initial_speed=rng.uniform(1.5, sc.V_CRUISE, size=n),
        initial_offset=rng.uniform(-0.3, 0.3, size=n),
        initial_heading=rng.uniform(-0.05, 0.05, size=n),
    )


def rollout(
    policy: Policy | None,
    n_rollouts: int,
    seed: int | np.random.Generator,
    *,
    kind: str,
    takeover: bool = False,
    with_scene: bool = True,
    key_prefix: str = "demo",
    n_robots: int = 8,
    max_time_s: float = sc.MAX_TIME_S,
) -> RolloutResult:
    """Run ``n_rollouts`` rollouts of ``policy`` (None: the expert drives, as in demonstrations).

    Parameters
    ----------
    policy : callable (n, d) float32 features -> PolicyOutput, or None
    n_rollouts : int
    seed : int or numpy.random.Generator
        Draws the world, then the per-step noise.
    kind : {"discrete", "continuous"}
    takeover : bool
        A safety driver (the expert) takes over for TAKEOVER_STEPS where
        ``expert.takeover_needed`` says so; those rows have control "expert".
    with_scene : bool
        Whether to build the per-step scene JSON (costs a little time).
    key_prefix : str
        Rollout keys are ``f"{key_prefix}-{i:04d}"``.
    """
    if n_rollouts < 1:
        raise ValueError(f"n_rollouts must be >= 1, got {n_rollouts}")
    rng = np.random.default_rng(seed)
    world = sample_world(n_rollouts, rng)
    return simulate(
        world,
        policy,
        rng,
        kind=kind,
        takeover=takeover,
        with_scene=with_scene,
        key_prefix=key_prefix,
        n_robots=n_robots,
        max_time_s=max_time_s,
    )


def _check_output(out: sc.PolicyOutput, n: int, kind: str) -> None:
    shape = (n,) if kind == "discrete" else (n, len(sc.CONTINUOUS_DIMENSIONS))
    if np.shape(out.action) != shape:
        raise ValueError(f"policy returned actions of shape {np.shape(out.action)}, not {shape}")


def simulate(
    world: World,
    policy: Policy | None,
    rng: np.random.Generator,
    *,
    kind: str,
    takeover: bool = False,
    with_scene: bool = True,
    key_prefix: str = "demo",
    n_robots: int = 8,
    max_time_s: float = sc.MAX_TIME_S,
) -> RolloutResult:
    """Run ``policy`` in a given world; ``rng`` draws the per-step noise. See ``rollout``."""
    sc.check_kind(kind)
    if n_robots < 1 or max_time_s <= 0:
        raise ValueError("n_robots must be >= 1 and max_time_s > 0")
    if takeover and policy is None:
        raise ValueError("takeover needs a learner policy")
    n, n_cross = world.crossing_pos.shape
    pos, length = world.crossing_pos, world.train_length
    accel, brake = sc.accel_limit(world.load_mass), sc.brake_limit(world.load_mass)
    zone_edge = sc.MAIN_AISLE_HALF_WIDTH + np.asarray(sc.AGENT_HALF_LENGTH)[world.agent_kind]
    state = {
        "s": np.zeros(n),
        "v": world.initial_speed.copy(),
        "y": world.initial_offset.copy(),
        "psi": world.initial_heading.copy(),
        # Agent's signed progress along its side aisle, 0 at the path; NaN until it starts.
        "q": np.full((n, n_cross), np.nan),
    }
    conflict = np.zeros((n, n_cross), dtype=bool)
    enter_t = np.full((n, n_cross), np.nan)
    clear_t = np.full((n, n_cross), np.nan)
    takeover_left = np.zeros(n, dtype=np.int64)
    done = np.zeros(n, dtype=bool)
    n_takeovers = 0
    parts: dict[str, list[NDArray[Any]]] = {}

    def keep(name: str, value: NDArray[Any]) -> None:
        parts.setdefault(name, []).append(value)

    for k in range(int(round(max_time_s / sc.DT_S))):
        # Drawn every step for every rollout, done or not, so a seed gives the same world to
        # every policy.
        noise = np.asarray(rng.standard_normal(size=(n,)), dtype=np.float64)
        active = np.flatnonzero(~done)
        if active.size == 0:
            break
        next_idx = np.sum(~np.isnan(clear_t), axis=1)
        feats32 = _features(world, state, next_idx, zone_edge)[active].astype(np.float32)
        feats = feats32.astype(np.float64)  # everyone sees exactly what the files record
        expert_action = expert.actions(feats, kind)
        if policy is None:
            applied, by_expert = expert_action, np.ones(active.size, dtype=bool)
        else:
            out = policy(feats32)
            _check_output(out, active.size, kind)
            by_expert = np.zeros(active.size, dtype=bool)
            if takeover:
                need = expert.takeover_needed(feats, out.action, expert_action, kind)
                n_takeovers += int(np.sum(need & (takeover_left[active] == 0)))
                takeover_left[active[need]] = sc.TAKEOVER_STEPS
                by_expert = takeover_left[active] > 0
                takeover_left[active] = np.maximum(takeover_left[active] - 1, 0)
            mask = by_expert if kind == "discrete" else by_expert[:, None]
            applied = np.where(mask, expert_action, out.action)
            keep("learner_action", np.asarray(out.action))
            if out.probs is not None:
                keep("learner_probs", np.asarray(out.probs, dtype=np.float64))
            if out.ensemble is not None:
                keep("learner_ensemble", np.asarray(out.ensemble, dtype=np.float64))
        keep("index", active)
        keep("step", np.full(active.size, k, dtype=np.int64))
        keep("features", feats32)
        keep("by_expert", by_expert)
        keep("expert_action", expert_action)
        if with_scene:
            keep("scene", _scenes(world, state, next_idx, active, feats))

        _advance(world, state, active, applied, feats, kind, accel, brake, noise)
        s = state["s"]
        t_after = (k + 1) * sc.DT_S
        act = ~done
        in_zone_self = (s[:, None] > pos - sc.SIDE_AISLE_HALF_WIDTH) & (
            s[:, None] - length[:, None] < pos + sc.SIDE_AISLE_HALF_WIDTH
        )
        in_zone_agent = np.abs(np.nan_to_num(state["q"], nan=np.inf)) < zone_edge
        conflict |= in_zone_self & in_zone_agent & act[:, None]
        reached = (s[:, None] >= pos - sc.APPROACH_M) & np.isnan(enter_t) & act[:, None]
        enter_t[reached] = t_after
        cleared = (s[:, None] - length[:, None] > pos + sc.SIDE_AISLE_HALF_WIDTH) & np.isnan(
            clear_t
        )
        clear_t[cleared & act[:, None]] = t_after
        done |= s - length > pos[:, -1] + sc.SIDE_AISLE_HALF_WIDTH + sc.END_MARGIN_M

    return _assemble(
        world,
        parts,
        kind,
        policy is not None,
        done,
        conflict,
        enter_t,
        clear_t,
        n_takeovers,
        key_prefix,
        n_robots,
    )


def _features(
    world: World, state: dict[str, FloatArray], next_idx: NDArray[Any], zone_edge: FloatArray
) -> FloatArray:
    """All rollouts' features, shape (n, d) float64, in scenario.FEATURES order."""
    n, n_cross = world.crossing_pos.shape
    rows = np.arange(n)
    has_next = next_idx < n_cross
    j = np.minimum(next_idx, n_cross - 1)
    s, v = state["s"], state["v"]
    dist = np.minimum(
        np.where(has_next, world.crossing_pos[rows, j] - s, sc.DIST_CAP_M), sc.DIST_CAP_M
    )
    occluded = has_next & world.occluded[rows, j] & (dist > sc.REVEAL_DISTANCE_M)
    q, edge = state["q"][rows, j], zone_edge[rows, j]
    kind, speed = world.agent_kind[rows, j], world.agent_speed[rows, j]
    exists = has_next & (kind > 0) & ~np.isnan(q)
    q = np.nan_to_num(q, nan=-np.inf)
    exists &= q <= edge + sc.AGENT_EXIT_M
    seen = exists & (np.abs(q) <= sc.SENSOR_RANGE_M)
    seen &= ~occluded | (np.abs(q) <= sc.REVEAL_AGENT_DISTANCE_M)
    safe_q = np.where(seen, q, 0.0)
    to_conflict = np.where(safe_q < -edge, (-edge - safe_q) / speed, 0.0)
    to_conflict = np.where(seen & (safe_q <= edge), to_conflict, sc.TIME_CAP_S)
    to_clear_agent = np.where(seen, np.maximum((edge - safe_q) / speed, 0.0), 0.0)
    clear_distance = dist + sc.SIDE_AISLE_HALF_WIDTH + world.train_length
    to_clear_self = np.where(
        has_next, sc.time_to_cover(clear_distance, v, sc.accel_limit(world.load_mass)), 0.0
    )
    columns = [
        dist,
        v,
        state["y"],
        state["psi"],
        world.load_mass,
        world.train_length,
        occluded.astype(np.float64),
        seen.astype(np.float64),
        np.where(seen, kind, 0).astype(np.float64),
        np.where(seen, np.abs(safe_q), sc.SENSOR_RANGE_M),
        np.where(seen, speed, 0.0),
        np.minimum(to_conflict, sc.TIME_CAP_S),
        np.minimum(to_clear_agent, sc.TIME_CAP_S),
        np.minimum(to_clear_self, sc.TIME_CAP_S),
        next_idx.astype(np.float64),
    ]
    return np.column_stack(columns)


def _advance(
    world: World,
    state: dict[str, FloatArray],
    active: NDArray[Any],
    applied: NDArray[Any],
    feats: FloatArray,
    kind: str,
    accel: FloatArray,
    brake: FloatArray,
    noise: FloatArray,
) -> None:
    """One 0.1 s step of the active tractors and of every started agent, in place."""
    f = sc.FEATURE_INDEX
    if kind == "discrete":
        target = sc.target_speed(applied, feats[:, f["dist_to_crossing"]], feats[:, f["load_mass"]])
        kappa = sc.lane_keeping_curvature(
            feats[:, f["lateral_offset"]], feats[:, f["heading_error"]]
        )
    else:
        target = np.clip(applied[:, 0], 0.0, sc.V_CRUISE)
        kappa = np.clip(applied[:, 1], -sc.CURVATURE_LIMIT, sc.CURVATURE_LIMIT)
    v = state["v"][active]
    a = np.clip((target - v) / sc.SPEED_TIME_CONSTANT_S, -brake[active], accel[active])
    v_new = np.maximum(v + a * sc.DT_S, 0.0)
    v_mean = 0.5 * (v + v_new)
    psi = state["psi"][active]
    psi_new = psi + v_mean * (kappa + world.curvature_bias[active]) * sc.DT_S
    psi_new += noise[active] * sc.HEADING_NOISE_RAD * (v_mean / sc.V_CRUISE)
    state["y"][active] += v_mean * np.sin(0.5 * (psi + psi_new)) * sc.DT_S
    state["psi"][active] = psi_new
    state["s"][active] += v_mean * sc.DT_S
    state["v"][active] = v_new
    # Agents: those already walking move on; new ones start when the tractor comes near.
    q = state["q"]
    live = np.zeros(q.shape, dtype=bool)
    live[active] = True
    walking = live & ~np.isnan(q)
    q[walking] += (world.agent_speed * sc.DT_S)[walking]
    edge = sc.MAIN_AISLE_HALF_WIDTH + np.asarray(sc.AGENT_HALF_LENGTH)[world.agent_kind]
    near = state["s"][:, None] >= world.crossing_pos - sc.AGENT_TRIGGER_M
    start = live & np.isnan(q) & (world.agent_kind > 0) & near
    q[start] = -(edge + world.agent_speed * world.agent_lead_time)[start]


def _to_robot_frame(
    x: float, y: float, heading: float, pose: tuple[float, float, float]
) -> dict[str, float]:
    s, lateral, psi = pose
    dx, dy = x - s, y - lateral
    c, si = np.cos(psi), np.sin(psi)
    return {
        "x": round(float(c * dx + si * dy), 2),
        "y": round(float(-si * dx + c * dy), 2),
        "heading": round(float(heading - psi), 3),
    }


def _scenes(
    world: World,
    state: dict[str, FloatArray],
    next_idx: NDArray[Any],
    active: NDArray[Any],
    feats: FloatArray,
) -> NDArray[Any]:
    """Scene JSON per active rollout: carts, rack ends of the next crossing, the seen agent."""
    f = sc.FEATURE_INDEX
    out = []
    for row, r in enumerate(active):
        pose = (float(state["s"][r]), float(state["y"][r]), float(state["psi"][r]))
        agents: list[dict[str, Any]] = []
        n_carts = int(round((world.train_length[r] - sc.TRACTOR_LENGTH_M) / sc.CART_LENGTH_M))
        for i in range(n_carts):
            x = pose[0] - sc.TRACTOR_LENGTH_M - sc.CART_LENGTH_M * (i + 0.5)
            agents.append({"kind": "cart", **_to_robot_frame(x, 0.0, 0.0, pose)})
        j = int(next_idx[r])
        if j < world.crossing_pos.shape[1] and feats[row, f["dist_to_crossing"]] < sc.DIST_CAP_M:
            c = float(world.crossing_pos[r, j])
            # Flush rack ends hide the side aisle; set-back ones leave the corner open.
            lateral = sc.MAIN_AISLE_HALF_WIDTH + (0.6 if world.occluded[r, j] else 3.6)
            for dx in (-1.0, 1.0):
                for dy in (-1.0, 1.0):
                    x = c + dx * (sc.SIDE_AISLE_HALF_WIDTH + 0.6)
                    agents.append({"kind": "rack", **_to_robot_frame(x, dy * lateral, 0.0, pose)})
            if feats[row, f["agent_present"]] > 0.5:
                side = float(world.agent_side[r, j])
                y = -side * float(state["q"][r, j])
                kind = "pedestrian" if world.agent_kind[r, j] == 1 else "forklift"
                heading = -side * np.pi / 2
                agents.append({"kind": kind, **_to_robot_frame(c, y, heading, pose)})
        out.append(json.dumps({"frame": "robot", "agents": agents}, separators=(",", ":")))
    return np.asarray(out, dtype=object)


def _assemble(
    world: World,
    parts: dict[str, list[NDArray[Any]]],
    kind: str,
    has_learner: bool,
    done: NDArray[np.bool_],
    conflict: NDArray[np.bool_],
    enter_t: FloatArray,
    clear_t: FloatArray,
    n_takeovers: int,
    key_prefix: str,
    n_robots: int,
) -> RolloutResult:
    """Concatenate the per-step parts, sort rows by rollout then step, compute the measures."""
    cat = {name: np.concatenate(values) for name, values in parts.items()}
    order = np.lexsort((cat["step"], cat["index"]))
    cat = {name: values[order] for name, values in cat.items()}
    index = cat.pop("index")
    by_expert = cat.pop("by_expert")
    n = len(world.load_mass)
    keys = np.asarray([f"{key_prefix}-{i:04d}" for i in range(n)], dtype=object)
    robots = np.asarray([f"tractor-{i % n_robots + 1:02d}" for i in range(n)], dtype=object)
    columns: dict[str, NDArray[Any]] = {
        "rollout": keys[index],
        "step": cat.pop("step"),
    }
    # Divide rather than multiply by DT_S so that times print as 47.4, not 47.400000000000006.
    columns["time_s"] = columns["step"].astype(np.float64) / round(1.0 / sc.DT_S)
    columns["features"] = cat.pop("features")
    columns["control"] = np.where(by_expert, "expert", "learner").astype(object)
    columns["robot"] = robots[index]
    columns.update(cat)

    crossings = int(np.sum(~np.isnan(clear_t)))
    conflicts = int(np.sum(conflict))
    times = clear_t - enter_t
    lateral = np.abs(columns["features"][:, sc.FEATURE_INDEX["lateral_offset"]])
    measures = {
        "rollouts": float(n),
        "steps": float(len(index)),
        "crossings": float(crossings),
        "conflicts": float(conflicts),
        "conflicts_per_100_crossings": 100.0 * conflicts / max(crossings, 1),
        "mean_crossing_time_s": float(np.nanmean(times)) if crossings else float("nan"),
        "stalled_rollouts": float(np.sum(~done)),
        "takeovers": float(n_takeovers),
        "expert_control_share": float(np.mean(by_expert)) if has_learner else 1.0,
        "mean_abs_lateral_offset_m": float(np.mean(lateral)),
    }
    return RolloutResult(kind=kind, columns=columns, measures=measures)
