"""Scripted expert and a naive baseline for the demo scenario (invented rules and numbers).

The expert is a pure function of the features, so a demo can play the annotator by calling it
on the states the service hands out. Its rule is a time gap: hold when a seen agent would be in
the conflict zone while the tractor and its carts are still in it (with a margin), creep towards
occluded crossings, otherwise proceed. The continuous expert turns the same decision into a
target speed and steers back to the lane centre.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import NDArray

from . import scenario as sc

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

_F = sc.FEATURE_INDEX


def _features(features: NDArray[Any]) -> FloatArray:
    x = np.asarray(features, dtype=np.float64)
    if x.ndim != 2 or x.shape[1] != sc.N_FEATURES:
        raise ValueError(f"features must have shape (n, {sc.N_FEATURES}), got {x.shape}")
    return x


def time_to_enter_self(features: NDArray[Any]) -> FloatArray:
    """Time (s) until the tractor's front enters the zone if it proceeds; 0 once inside.

    Parameters
    ----------
    features : ndarray of shape (n, n_features)

    Returns
    -------
    ndarray of shape (n,)
    """
    x = _features(features)
    to_zone = x[:, _F["dist_to_crossing"]] - sc.SIDE_AISLE_HALF_WIDTH
    accel = sc.accel_limit(x[:, _F["load_mass"]])
    return np.minimum(sc.time_to_cover(to_zone, x[:, _F["speed"]], accel), sc.TIME_CAP_S)


def discrete_actions(features: NDArray[Any]) -> IntArray:
    """The expert's discrete action index (proceed 0, creep 1, hold 2) per state, shape (n,)."""
    x = _features(features)
    dist = x[:, _F["dist_to_crossing"]]
    present = x[:, _F["agent_present"]] > 0.5
    agent_enters = x[:, _F["time_to_conflict_agent"]]
    agent_clears = x[:, _F["time_to_clear_agent"]]
    self_enters = time_to_enter_self(x)
    self_clears = x[:, _F["time_to_clear_self"]]
    # Two occupancy intervals of the zone overlap, widened by the margin on both sides.
    overlap = (agent_enters < self_clears + sc.TIME_GAP_MARGIN_S) & (
        agent_clears + sc.TIME_GAP_MARGIN_S > self_enters
    )
    # Once the front is in the zone, stopping would leave the train standing in it: clear it.
    committed = dist < sc.SIDE_AISLE_HALF_WIDTH + 0.2
    hold = present & overlap & ~committed
    creep = (x[:, _F["occluded"]] > 0.5) & (dist <= sc.CREEP_START_M) & ~hold
    return np.where(hold, sc.HOLD, np.where(creep, sc.CREEP, sc.PROCEED)).astype(np.int64)


def continuous_actions(features: NDArray[Any]) -> FloatArray:
    """The expert's (speed_cmd m/s, curvature 1/m) per state, shape (n, 2)."""
    x = _features(features)
    decision = discrete_actions(x)
    speed = sc.target_speed(decision, x[:, _F["dist_to_crossing"]], x[:, _F["load_mass"]])
    kappa = sc.lane_keeping_curvature(x[:, _F["lateral_offset"]], x[:, _F["heading_error"]])
    return np.column_stack([speed, kappa])


def actions(features: NDArray[Any], kind: str) -> NDArray[Any]:
    """The expert's actions for ``kind`` ("discrete": (n,) int64, "continuous": (n, 2))."""
    sc.check_kind(kind)
    return discrete_actions(features) if kind == "discrete" else continuous_actions(features)


def policy(kind: str) -> Callable[[NDArray[Any]], sc.PolicyOutput]:
    """The expert as a policy callable for the simulator."""
    sc.check_kind(kind)
    return lambda features: sc.PolicyOutput(action=actions(features, kind))


def always_proceed(kind: str) -> Callable[[NDArray[Any]], sc.PolicyOutput]:
    """Naive baseline: always proceed at cruise speed (continuous: still keeps its lane)."""
    sc.check_kind(kind)

    def run(features: NDArray[Any]) -> sc.PolicyOutput:
        x = _features(features)
        if kind == "discrete":
            return sc.PolicyOutput(action=np.full(len(x), sc.PROCEED, dtype=np.int64))
        kappa = sc.lane_keeping_curvature(x[:, _F["lateral_offset"]], x[:, _F["heading_error"]])
        return sc.PolicyOutput(action=np.column_stack([np.full(len(x), sc.V_CRUISE), kappa]))

    return run


def takeover_needed(
    features: NDArray[Any], learner_action: NDArray[Any], expert_action: NDArray[Any], kind: str
) -> NDArray[np.bool_]:
    """Where a safety driver would take over from the learner, shape (n,) bool.

    Only clear safety cases count: the expert would hold (or go much slower) for a seen agent
    that reaches the zone within TAKEOVER_HORIZON_S, and the learner does not.
    """
    x = _features(features)
    sc.check_kind(kind)
    soon = (x[:, _F["agent_present"]] > 0.5) & (
        x[:, _F["time_to_conflict_agent"]] < sc.TAKEOVER_HORIZON_S
    )
    if kind == "discrete":
        unsafe = (np.asarray(expert_action) == sc.HOLD) & (np.asarray(learner_action) != sc.HOLD)
    else:
        gap = np.asarray(learner_action)[:, 0] - np.asarray(expert_action)[:, 0]
        unsafe = gap > sc.TAKEOVER_SPEED_GAP
    return np.asarray(soon & unsafe, dtype=np.bool_)
