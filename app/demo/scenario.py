"""The demo scenario: tow tractors passing side-aisle crossings in a warehouse.

Every number in this module is INVENTED for the demo. The scenario is our own toy world, made so
that a learner trained on a few demonstrations visibly fails and dataset aggregation rounds
visibly help. It is not a model of any real vehicle, warehouse or safety function, and nothing
learned from it says anything about real machines.

World (all invented): a tow tractor pulls carts along a warehouse's main aisle, travelling along
+x. Side aisles cross the main aisle at a few crossings; at each crossing a pedestrian or a
forklift may cross. At some crossings rack ends stand flush with the main aisle and hide the side
aisle until the tractor is close ("occluded" crossings). The conflict zone of a crossing is the
rectangle shared by the two aisles; a conflict is the tractor or its carts in that zone while an
agent is in it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]

INVENTED_NOTE = "Invented demo scenario: every number is made up; not a model of real machines."

# --- time --------------------------------------------------------------------------------------
DT_S = 0.1  # 10 Hz control
MAX_TIME_S = 120.0  # a rollout that has not passed all crossings by then is counted as stalled

# --- aisle geometry (m, invented) ----------------------------------------------------------------
SIDE_AISLE_HALF_WIDTH = 1.5  # half length of the conflict zone along the tractor's path
MAIN_AISLE_HALF_WIDTH = 1.3  # half width of the conflict zone across the tractor's path
N_CROSSINGS = 3  # crossings per rollout
FIRST_CROSSING_M = 30.0  # distance from the start to the first crossing
CROSSING_SPACING_M = (22.0, 34.0)  # uniform range of the spacing between crossings
END_MARGIN_M = 2.0  # a rollout ends when the tail is this far past the last zone
STOP_MARGIN_M = 0.5  # where "hold" stops the front: this far before the zone
APPROACH_M = 15.0  # crossing time is measured from the front this far before the centre
OCCLUDED_SHARE = 0.5  # share of crossings with rack ends flush with the main aisle
REVEAL_DISTANCE_M = 3.5  # front this close to the centre sees round the rack ends
REVEAL_AGENT_DISTANCE_M = 2.5  # an agent this close to the path is seen even when occluded
SENSOR_RANGE_M = 25.0  # agents farther from the path than this are not reported
DIST_CAP_M = 30.0  # dist_to_crossing when no crossing is ahead, and its upper cap
TIME_CAP_S = 15.0  # cap of the time features (also "never")

# --- tractor (invented) --------------------------------------------------------------------------
V_CRUISE = 2.0  # m/s, target speed of "proceed"
V_CREEP = 0.6  # m/s, target speed of "creep"
V_HOLD_APPROACH = 1.0  # m/s: "hold" slows early to this, then stops before the zone
SPEED_TIME_CONSTANT_S = 0.3  # first-order speed tracking before the acceleration limits
ACCEL_REF = 1.0  # m/s^2 at zero load ...
MASS_REF_KG = 3000.0  # ... falling as MASS_REF / (MASS_REF + load): heavy trains are sluggish
BRAKE_TO_ACCEL = 2.0  # braking limit relative to the acceleration limit
HOLD_BRAKE_SHARE = 0.7  # "hold" plans its stop with this share of the braking limit
LOAD_RANGE_KG = (500.0, 6000.0)
TRACTOR_LENGTH_M = 2.5
CART_LENGTH_M = 2.5  # one cart including its coupling
CARTS_RANGE = (1, 3)  # inclusive
LANE_GAIN_OFFSET = 0.25  # 1/m^2: curvature per metre of lateral offset
LANE_GAIN_HEADING = 1.0  # 1/m: curvature per radian of heading error; critically damped at 2 m/s
CURVATURE_LIMIT = 0.2  # 1/m
CURVATURE_BIAS = 0.01  # 1/m, per-rollout floor slope / tyre wear, uniform in +-
HEADING_NOISE_RAD = 0.003  # per step

# --- crossing agents (invented) ------------------------------------------------------------------
AGENT_SHARE = 0.7  # share of crossings where an agent crosses while the tractor approaches
PEDESTRIAN_SHARE = 0.6
PEDESTRIAN_SPEED = (0.9, 1.6)  # m/s
FORKLIFT_SPEED = (1.5, 2.8)  # m/s
AGENT_HALF_LENGTH = (0.0, 0.4, 1.4)  # by agent_kind: none, pedestrian, forklift
AGENT_TRIGGER_M = 22.0  # the agent starts walking when the tractor's front is this far away
AGENT_LEAD_TIME_S = (2.0, 16.0)  # agent's time to reach the zone, counted from the trigger
AGENT_EXIT_M = 4.0  # an agent disappears this far past the zone

# --- expert rule (invented) ----------------------------------------------------------------------
TIME_GAP_MARGIN_S = 1.5  # the expert wants this much time between tractor and agent in the zone
CREEP_START_M = 9.0  # the expert creeps at occluded crossings from this distance
TAKEOVER_HORIZON_S = 6.0  # a safety driver steps in when the agent is this close in time
TAKEOVER_STEPS = 40  # and keeps control this many steps (4 s)
TAKEOVER_SPEED_GAP = 0.5  # m/s: continuous learner this much faster than the expert is unsafe

# --- actions -------------------------------------------------------------------------------------
DISCRETE_ACTIONS: tuple[str, ...] = ("proceed", "creep", "hold")
PROCEED, CREEP, HOLD = 0, 1, 2
CONTINUOUS_DIMENSIONS: tuple[dict[str, Any], ...] = (
    {"name": "speed_cmd", "low": 0.0, "high": 2.0, "unit": "m/s"},
    {"name": "curvature", "low": -0.2, "high": 0.2, "unit": "1/m"},
)
ACTION_KINDS = ("discrete", "continuous")

# --- features ------------------------------------------------------------------------------------
FEATURES: tuple[tuple[str, str], ...] = (
    ("dist_to_crossing", "m"),  # front to the next crossing's centre; negative once past it
    ("speed", "m/s"),
    ("lateral_offset", "m"),  # left of the lane centre is positive
    ("heading_error", "rad"),
    ("load_mass", "kg"),
    ("train_length", "m"),  # tractor plus carts
    ("occluded", "flag"),  # rack ends hide the next side aisle from where the tractor is
    ("agent_present", "flag"),  # an agent at the next crossing is seen
    ("agent_kind", "code"),  # 0 none, 1 pedestrian, 2 forklift
    ("agent_dist_to_path", "m"),  # SENSOR_RANGE_M when none
    ("agent_speed", "m/s"),  # 0 when none
    ("time_to_conflict_agent", "s"),  # until the agent enters the zone; 0 inside, cap if never
    ("time_to_clear_agent", "s"),  # until the agent has left the zone; 0 if none or gone
    ("time_to_clear_self", "s"),  # until the tail leaves the zone, if the tractor proceeds
    ("crossings_done", "count"),
)
FEATURE_NAMES: tuple[str, ...] = tuple(name for name, _ in FEATURES)
FEATURE_INDEX: dict[str, int] = {name: i for i, name in enumerate(FEATURE_NAMES)}
N_FEATURES = len(FEATURES)


@dataclass(frozen=True)
class PolicyOutput:
    """What a policy returns for a batch of states.

    Attributes
    ----------
    action : ndarray of shape (n,) int64 (discrete: action index) or (n, D) float64
    probs : ndarray of shape (n, K) or None
        Discrete only: action probabilities (the ensemble's mean).
    ensemble : ndarray of shape (n, M, K) or (n, M, D), or None
        Each ensemble member's probabilities (discrete) or action (continuous).
    """

    action: NDArray[Any]
    probs: FloatArray | None = None
    ensemble: FloatArray | None = None


def check_kind(kind: str) -> str:
    """Return ``kind`` if it is a known action-space kind, else raise ValueError."""
    if kind not in ACTION_KINDS:
        raise ValueError(f"action space kind must be one of {ACTION_KINDS}, got {kind!r}")
    return kind


def loop_spec(kind: str) -> dict[str, Any]:
    """The loop spec (JSON-ready dict) of the demo loop for one action-space kind."""
    check_kind(kind)
    action_space: dict[str, Any]
    if kind == "discrete":
        action_space = {"kind": "discrete", "actions": list(DISCRETE_ACTIONS)}
    else:
        action_space = {
            "kind": "continuous",
            "dimensions": [dict(d) for d in CONTINUOUS_DIMENSIONS],
        }
    return {
        "slug": f"tow-tractor-crossings-{kind}",
        "title": f"Tow tractor at aisle crossings ({kind} actions; invented demo scenario)",
        "features": [{"name": name, "unit": unit} for name, unit in FEATURES],
        "action_space": action_space,
        "settings": {},
    }


def accel_limit(load_mass: FloatArray) -> FloatArray:
    """Acceleration limit (m/s^2) for a load (kg), shape preserved."""
    return ACCEL_REF * MASS_REF_KG / (MASS_REF_KG + np.asarray(load_mass, dtype=np.float64))


def brake_limit(load_mass: FloatArray) -> FloatArray:
    """Braking limit (m/s^2, positive) for a load (kg), shape preserved."""
    return BRAKE_TO_ACCEL * accel_limit(load_mass)


def time_to_cover(distance: FloatArray, speed: FloatArray, accel: FloatArray) -> FloatArray:
    """Time (s) to cover ``distance`` accelerating at ``accel`` from ``speed`` up to V_CRUISE.

    Speeds above V_CRUISE are taken as V_CRUISE (the tractor never exceeds it for long).
    Non-positive distances give 0. All inputs broadcast; result float64.
    """
    d = np.maximum(np.asarray(distance, dtype=np.float64), 0.0)
    v = np.minimum(np.maximum(np.asarray(speed, dtype=np.float64), 0.0), V_CRUISE)
    a = np.asarray(accel, dtype=np.float64)
    t_ramp = (V_CRUISE - v) / a
    d_ramp = 0.5 * (v + V_CRUISE) * t_ramp
    t_in_ramp = (np.sqrt(v * v + 2.0 * a * d) - v) / a
    t_after_ramp = t_ramp + (d - d_ramp) / V_CRUISE
    return np.where(d <= d_ramp, t_in_ramp, t_after_ramp)


def hold_speed(dist_to_crossing: FloatArray, load_mass: FloatArray) -> FloatArray:
    """Target speed (m/s) of "hold": slow early, then a braking profile that stops before the zone.

    Slowing early (rather than cruising until the last braking point) leaves room for late
    surprises, and it makes "hold" differ from "proceed" as soon as it is chosen, which is what a
    continuous learner can pick up from demonstrations.
    """
    to_stop = np.asarray(dist_to_crossing, dtype=np.float64) - SIDE_AISLE_HALF_WIDTH - STOP_MARGIN_M
    brake = HOLD_BRAKE_SHARE * brake_limit(load_mass)
    return np.minimum(V_HOLD_APPROACH, np.sqrt(2.0 * brake * np.maximum(to_stop, 0.0)))


def target_speed(
    action: NDArray[Any], dist_to_crossing: FloatArray, load_mass: FloatArray
) -> FloatArray:
    """Target speed (m/s) of each discrete action index, shape (n,)."""
    action = np.asarray(action)
    return np.select(
        [action == PROCEED, action == CREEP],
        [np.full(action.shape, V_CRUISE), np.full(action.shape, V_CREEP)],
        default=hold_speed(dist_to_crossing, load_mass),
    )


def lane_keeping_curvature(lateral_offset: FloatArray, heading_error: FloatArray) -> FloatArray:
    """Curvature (1/m) that steers back to the lane centre, clipped to the curvature limit."""
    kappa = -LANE_GAIN_OFFSET * np.asarray(lateral_offset) - LANE_GAIN_HEADING * np.asarray(
        heading_error
    )
    return np.clip(kappa, -CURVATURE_LIMIT, CURVATURE_LIMIT)
