"""The demo's invented robot log: one simulated tow-tractor run recorded as a ROS 2 bag (MCAP),
and the log mapping that reads the demo loop's states back from it.

Everything here is invented, like the rest of the demo: the topics, the `tow_msgs` message and
the numbers. The bag is written with rosbags' own writer and stores its message definitions,
so the service decodes the invented `tow_msgs/msg/CrossingView` from the bag itself.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
from rosbags.typesys import get_types_from_msg

from ..ingest.logs.writer import typestore_for, write_bag
from . import scenario as sc
from .sim import RolloutResult

NS = 1_000_000_000
RECORDING_START_NS = 1_767_225_600 * NS  # an invented recording date (2026-01-01 UTC)
CROSSING_VIEW = "tow_msgs/msg/CrossingView"
CROSSING_VIEW_DEFINITION = """std_msgs/Header header
float64 dist_to_crossing
bool occluded
bool agent_present
uint8 agent_kind
float64 agent_dist_to_path
float64 agent_speed
float64 time_to_conflict_agent
float64 time_to_clear_agent
float64 time_to_clear_self
uint32 crossings_done
"""
TOPICS = {
    "/tractor/odom": "nav_msgs/msg/Odometry",
    "/tractor/tracking": "std_msgs/msg/Float64MultiArray",
    "/tractor/train": "std_msgs/msg/Float64MultiArray",
    "/perception/crossing": CROSSING_VIEW,
    "/policy/action": "std_msgs/msg/String",
    "/policy/probs": "std_msgs/msg/Float32MultiArray",
    "/policy/ensemble": "std_msgs/msg/Float32MultiArray",
    "/safety_driver/action": "std_msgs/msg/String",
    "/scene": "std_msgs/msg/String",
    "/drive_mode": "std_msgs/msg/String",
}
# each topic publishes a few ms after the simulator's step, the mode last
OFFSET_MS = dict(zip(TOPICS, (1, 2, 2, 3, 4, 4, 4, 4, 5, 6), strict=True))
CROSSING_FIELDS = (
    "dist_to_crossing",
    "occluded",
    "agent_present",
    "agent_kind",
    "agent_dist_to_path",
    "agent_speed",
    "time_to_conflict_agent",
    "time_to_clear_agent",
    "time_to_clear_self",
    "crossings_done",
)
FEATURE_SOURCES = {
    "speed": ("/tractor/odom", "twist.twist.linear.x"),
    "lateral_offset": ("/tractor/odom", "pose.pose.position.y"),
    "heading_error": ("/tractor/tracking", "data[1]"),
    "load_mass": ("/tractor/train", "data[0]"),
    "train_length": ("/tractor/train", "data[1]"),
} | {name: ("/perception/crossing", name) for name in CROSSING_FIELDS}


def log_mapping() -> dict[str, Any]:
    """The discrete demo loop's log mapping (JSON-ready), reading the demo bag at 10 Hz."""
    units = dict(sc.FEATURES)
    return {
        "step_rate_hz": round(1.0 / sc.DT_S),
        "max_age_s": 0.15,
        "on_missing": "drop",
        "features": {
            name: {"topic": topic, "field": path, "unit": units[name]}
            for name, (topic, path) in sorted(
                FEATURE_SOURCES.items(), key=lambda item: sc.FEATURE_NAMES.index(item[0])
            )
        },
        "learner_action": {"topic": "/policy/action", "field": "data"},
        "learner_probs": {"topic": "/policy/probs", "field": "data"},
        "learner_ensemble": {"topic": "/policy/ensemble", "field": "data", "members": 5},
        "expert_action": {"topic": "/safety_driver/action", "field": "data"},
        "control": {
            "topic": "/drive_mode",
            "field": "data",
            "values": {"AUTONOMOUS": "learner", "MANUAL": "expert"},
        },
        "scene": {"topic": "/scene", "format": "json"},
        "rollouts": {"split": "bag"},
    }


def write_demo_bag(result: RolloutResult, key: str, folder: Path) -> Path:
    """Record the rows of rollout `key` as a ROS 2 bag folder (MCAP) under `folder`."""
    ts = typestore_for("mcap")
    ts.register(get_types_from_msg(CROSSING_VIEW_DEFINITION, CROSSING_VIEW))
    rows = np.flatnonzero(result.columns["rollout"] == key)
    return write_bag(folder / key, "mcap", TOPICS, _messages(ts, result, rows), ts)


def _messages(ts: Any, result: RolloutResult, rows: np.ndarray) -> Any:
    T = ts.types
    cols = result.columns
    index = {name: i for i, name in enumerate(sc.FEATURE_NAMES)}
    actions = sc.DISCRETE_ACTIONS
    vector = T["geometry_msgs/msg/Vector3"]
    layout = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
    for row in rows:
        step_ns = RECORDING_START_NS + round(float(cols["time_s"][row]) * NS)
        f = cols["features"][row].astype(np.float64)

        def at(topic: str, step_ns: int = step_ns) -> int:
            return step_ns + OFFSET_MS[topic] * 1_000_000

        def header(topic: str) -> Any:
            t = at(topic)
            stamp = T["builtin_interfaces/msg/Time"](sec=t // NS, nanosec=t % NS)
            return T["std_msgs/msg/Header"](stamp=stamp, frame_id="tractor")

        pose = T["geometry_msgs/msg/PoseWithCovariance"](
            pose=T["geometry_msgs/msg/Pose"](
                position=T["geometry_msgs/msg/Point"](x=0.0, y=f[index["lateral_offset"]], z=0.0),
                orientation=T["geometry_msgs/msg/Quaternion"](x=0.0, y=0.0, z=0.0, w=1.0),
            ),
            covariance=np.zeros(36),
        )
        twist = T["geometry_msgs/msg/TwistWithCovariance"](
            twist=T["geometry_msgs/msg/Twist"](
                linear=vector(x=f[index["speed"]], y=0.0, z=0.0),
                angular=vector(x=0.0, y=0.0, z=0.0),
            ),
            covariance=np.zeros(36),
        )
        yield (
            "/tractor/odom",
            at("/tractor/odom"),
            T["nav_msgs/msg/Odometry"](
                header=header("/tractor/odom"), child_frame_id="tractor", pose=pose, twist=twist
            ),
        )
        tracking = np.array([f[index["lateral_offset"]], f[index["heading_error"]]])
        yield (
            "/tractor/tracking",
            at("/tractor/tracking"),
            T["std_msgs/msg/Float64MultiArray"](layout=layout, data=tracking),
        )
        train = np.array([f[index["load_mass"]], f[index["train_length"]]])
        yield (
            "/tractor/train",
            at("/tractor/train"),
            T["std_msgs/msg/Float64MultiArray"](layout=layout, data=train),
        )
        view = {name: f[index[name]] for name in CROSSING_FIELDS}
        yield (
            "/perception/crossing",
            at("/perception/crossing"),
            T[CROSSING_VIEW](
                header=header("/perception/crossing"),
                **{
                    **view,
                    "occluded": bool(view["occluded"]),
                    "agent_present": bool(view["agent_present"]),
                    "agent_kind": int(view["agent_kind"]),
                    "crossings_done": int(view["crossings_done"]),
                },
            ),
        )
        if "learner_action" in cols and cols["learner_action"][row] >= 0:
            action = actions[int(cols["learner_action"][row])]
            yield "/policy/action", at("/policy/action"), T["std_msgs/msg/String"](data=action)
            probs = np.asarray(cols["learner_probs"][row], dtype=np.float32)
            yield (
                "/policy/probs",
                at("/policy/probs"),
                T["std_msgs/msg/Float32MultiArray"](layout=layout, data=probs),
            )
            members = np.asarray(cols["learner_ensemble"][row], dtype=np.float32).reshape(-1)
            yield (
                "/policy/ensemble",
                at("/policy/ensemble"),
                T["std_msgs/msg/Float32MultiArray"](layout=layout, data=members),
            )
        expert = cols["control"][row] == "expert"
        if expert:
            action = actions[int(cols["expert_action"][row])]
            yield (
                "/safety_driver/action",
                at("/safety_driver/action"),
                T["std_msgs/msg/String"](data=action),
            )
        if "scene" in cols:
            scene = json.loads(cols["scene"][row])
            yield (
                "/scene",
                at("/scene"),
                T["std_msgs/msg/String"](data=json.dumps(scene, separators=(",", ":"))),
            )
        mode = "MANUAL" if expert else "AUTONOMOUS"
        yield "/drive_mode", at("/drive_mode"), T["std_msgs/msg/String"](data=mode)
