"""Bags built inside the tests with rosbags' own writers: a small invented tow-tractor log whose
every message value is known, so tests can compare each mapped value with what was written."""

from __future__ import annotations

import io
import json
import shutil
import tarfile
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from PIL import Image

from expertloop.ingest.logs.writer import Storage, storage_file, typestore_for, write_bag

NS = 1_000_000_000
T0 = 1_700_000_000 * NS  # an invented recording start

TOPICS = {
    "/odom": "nav_msgs/msg/Odometry",
    "/joint_states": "sensor_msgs/msg/JointState",
    "/mode": "std_msgs/msg/String",
    "/policy/action": "std_msgs/msg/Int32",
    "/policy/probs": "std_msgs/msg/Float32MultiArray",
    "/teleop/action": "std_msgs/msg/Int32",
    "/camera/compressed": "sensor_msgs/msg/CompressedImage",
    "/scene": "std_msgs/msg/String",
}

# the discrete test loop's log mapping (tests.helpers.DISCRETE_SPEC: gap_m, speed, occluded)
MAPPING: dict[str, Any] = {
    "step_rate_hz": 10,
    "max_age_s": 0.25,
    "topics": {"/odom": {"resample": "linear"}},
    "features": {
        "gap_m": {"topic": "/odom", "field": "pose.pose.position.x", "unit": "m"},
        "speed": {"topic": "/odom", "field": "twist.twist.linear.x", "unit": "m/s"},
        "occluded": {"topic": "/joint_states", "field": "velocity[3]"},
    },
    "learner_action": {"topic": "/policy/action", "field": "data"},
    "learner_probs": {"topic": "/policy/probs", "field": "data"},
    "expert_action": {
        "topic": "/teleop/action",
        "field": "data",
        "values": {"0": "proceed", "1": "creep", "2": "hold"},
    },
    "control": {
        "topic": "/mode",
        "field": "data",
        "values": {"AUTO": "learner", "MANUAL": "expert"},
    },
    "image": {"topic": "/camera/compressed", "max_age_s": 0.1},
    "scene": {"topic": "/scene", "format": "json"},
}


@dataclass
class Written:
    """What a builder wrote: per topic the log times (ns) and the values the mapping reads."""

    path: Path
    times: dict[str, list[int]] = field(default_factory=dict)
    values: dict[str, list[Any]] = field(default_factory=dict)

    def add(self, topic: str, stamp: int, value: Any) -> None:
        self.times.setdefault(topic, []).append(stamp)
        self.values.setdefault(topic, []).append(value)


def png(shade: int) -> bytes:
    out = io.BytesIO()
    Image.fromarray(np.full((4, 6, 3), shade, dtype=np.uint8)).save(out, format="PNG")
    return out.getvalue()


def header(ts: Any, storage: Storage, stamp: int, frame: str = "base_link") -> Any:
    Header = ts.types["std_msgs/msg/Header"]
    Time = ts.types["builtin_interfaces/msg/Time"]
    time = Time(sec=stamp // NS, nanosec=stamp % NS)
    if storage == "ros1":
        return Header(seq=0, stamp=time, frame_id=frame)
    return Header(stamp=time, frame_id=frame)


def tractor_messages(
    storage: Storage,
    *,
    seconds: float = 4.0,
    takeover: tuple[float, float] = (2.0, 3.0),
    stamp_lag_ns: int = 0,
) -> tuple[list[tuple[str, int, Any]], Written]:
    """Messages of an invented tractor log, in time order, with the values the mapping reads.

    /odom 20 Hz (header stamps `stamp_lag_ns` before log time), /joint_states 20 Hz,
    /policy/* and /teleop/action 10 Hz (teleop only during the takeover), /mode 5 Hz,
    /camera/compressed 5 Hz, /scene 2 Hz.
    """
    ts = typestore_for(storage)
    T = ts.types
    written = Written(Path())
    out: list[tuple[str, int, Any]] = []
    period = NS // 20
    for i in range(int(seconds * 20) + 1):
        t = T0 + 3 * NS // 1000 + i * period  # 3 ms after the start: off the step grid
        stamp = t - stamp_lag_ns
        x, v = 10.0 - 0.05 * i, 1.0 + 0.01 * i * (-1) ** i
        pose = T["geometry_msgs/msg/PoseWithCovariance"](
            pose=T["geometry_msgs/msg/Pose"](
                position=T["geometry_msgs/msg/Point"](x=x, y=0.0, z=0.0),
                orientation=T["geometry_msgs/msg/Quaternion"](x=0.0, y=0.0, z=0.0, w=1.0),
            ),
            covariance=np.zeros(36),
        )
        twist = T["geometry_msgs/msg/TwistWithCovariance"](
            twist=T["geometry_msgs/msg/Twist"](
                linear=T["geometry_msgs/msg/Vector3"](x=v, y=0.0, z=0.0),
                angular=T["geometry_msgs/msg/Vector3"](x=0.0, y=0.0, z=0.0),
            ),
            covariance=np.zeros(36),
        )
        odom = T["nav_msgs/msg/Odometry"](
            header=header(ts, storage, stamp), child_frame_id="base", pose=pose, twist=twist
        )
        out.append(("/odom", t, odom))
        written.add("/odom", stamp, (x, v))
        joints = T["sensor_msgs/msg/JointState"](
            header=header(ts, storage, t),
            name=["a", "b", "c", "d"],
            position=np.zeros(4),
            velocity=np.array([0.0, 1.0, 2.0, float(i % 2)]),
            effort=np.zeros(4),
        )
        out.append(("/joint_states", t + 1000, joints))
        written.add("/joint_states", t + 1000, float(i % 2))
        if i % 2 == 0:
            k = i // 2
            in_takeover = takeover[0] <= k / 10 < takeover[1]
            out.append(("/policy/action", t + 2000, T["std_msgs/msg/Int32"](data=k % 3)))
            written.add("/policy/action", t + 2000, k % 3)
            probs = np.array([0.2, 0.3, 0.5], dtype=np.float32)[np.roll(np.arange(3), k)]
            layout = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
            message = T["std_msgs/msg/Float32MultiArray"](layout=layout, data=probs)
            out.append(("/policy/probs", t + 3000, message))
            written.add("/policy/probs", t + 3000, probs.astype(np.float64))
            if in_takeover:
                out.append(("/teleop/action", t + 4000, T["std_msgs/msg/Int32"](data=2)))
                written.add("/teleop/action", t + 4000, 2)
        if i % 4 == 0:
            k = i // 4
            mode = "MANUAL" if takeover[0] <= k / 5 < takeover[1] else "AUTO"
            out.append(("/mode", t + 5000, T["std_msgs/msg/String"](data=mode)))
            written.add("/mode", t + 5000, mode)
            image = png(k % 256)
            frame = T["sensor_msgs/msg/CompressedImage"](
                header=header(ts, storage, t + 6000),
                format="png",
                data=np.frombuffer(image, np.uint8),
            )
            out.append(("/camera/compressed", t + 6000, frame))
            written.add("/camera/compressed", t + 6000, image)
        if i % 10 == 0:
            scene = json.dumps(
                {
                    "frame": "robot",
                    "agents": [{"kind": "pedestrian", "x": float(i), "y": 1.0, "heading": 0.0}],
                }
            )
            out.append(("/scene", t + 7000, T["std_msgs/msg/String"](data=scene)))
            written.add("/scene", t + 7000, scene)
    out.sort(key=lambda m: m[1])
    return out, written


def build(
    folder: Path, storage: Storage, name: str = "t07-run", **kwargs: Any
) -> tuple[Path, Written]:
    """Write the tractor bag; return the file to upload (.mcap, .bag, or a .tar of the
    SQLite bag folder) and what was written."""
    messages, written = tractor_messages(storage, **kwargs)
    ts = typestore_for(storage)
    if storage == "ros1":
        path = write_bag(folder / f"{name}.bag", "ros1", TOPICS, messages, ts)
    else:
        bag = write_bag(folder / name, storage, TOPICS, messages, ts)
        if storage == "mcap":
            path = folder / f"{name}.mcap"
            shutil.copyfile(storage_file(bag), path)
        else:
            path = tar_folder(bag, folder / f"{name}.tar")
    written.path = path
    return path, written


def tar_folder(bag: Path, target: Path) -> Path:
    with tarfile.open(target, "w") as archive:
        archive.add(bag, arcname=bag.name)
    return target


def zip_folder(bag: Path, target: Path) -> Path:
    with zipfile.ZipFile(target, "w") as archive:
        for item in sorted(bag.iterdir()):
            archive.write(item, f"{bag.name}/{item.name}")
    return target
