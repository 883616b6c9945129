"""Robot-log ingest benchmark: uploading a bag through the service against merely reading it.

    python bench/bag_ingest.py --messages 1000000               # ROS 2 MCAP, SQLite store
    python bench/bag_ingest.py --messages 200000 --storage ros1
    python bench/bag_ingest.py --messages 1000000 --topic-hz 400   # the steps of 250,000 at 100

Writes one bag (rosbags' writer) of N messages over 10 topics at 100 Hz each (an invented
tow-tractor log: odometry, IMU, joint states, a range sensor, battery, mode, the policy's action
and probabilities, a teleoperation action, a velocity command), then, each in a fresh process so
peak memory is its own:
- baseline: read every message with rosbags and decode it (AnyReader.messages + deserialize);
- ingest: the service's upload path on the same file (read through the loop's log mapping at
  10 Hz, validate, store in a fresh SQLite store).
Prints messages per second of both, their ratio (target: ingest at least 0.5x the baseline), the
same ratio by each process's CPU time (steadier than wall-clock time on a loaded machine) and
each process's peak resident memory next to the bag's size: the peak, and the peak above the
process's resident memory just before its timed part began (imports done, store made), which is
what the work itself took. Memory grows with the steps a bag maps to (10 Hz over the bag's
length); to see whether it grows with the messages, compare 250,000 messages at 100 Hz with
1,000,000 at 400 Hz (`--topic-hz`): the same 2,500 steps.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from expertloop.ingest.logs.writer import Storage, storage_file, typestore_for, write_bag  # noqa: E402

NS = 1_000_000_000
RATE_HZ = 100
TOPICS = {
    "/odom": "nav_msgs/msg/Odometry",
    "/imu": "sensor_msgs/msg/Imu",
    "/joint_states": "sensor_msgs/msg/JointState",
    "/range": "sensor_msgs/msg/Range",
    "/battery": "sensor_msgs/msg/BatteryState",
    "/mode": "std_msgs/msg/String",
    "/policy/action": "std_msgs/msg/Int32",
    "/policy/probs": "std_msgs/msg/Float32MultiArray",
    "/teleop/action": "std_msgs/msg/Int32",
    "/cmd_vel": "geometry_msgs/msg/Twist",
}
SPEC: dict[str, Any] = {
    "slug": "bench-bag",
    "title": "Bag ingest benchmark (invented)",
    "features": [
        {"name": "speed", "unit": "m/s"},
        {"name": "aisle_x", "unit": "m"},
        {"name": "yaw_rate", "unit": "rad/s"},
        {"name": "wheel_speed", "unit": "rad/s"},
        {"name": "range", "unit": "m"},
        {"name": "voltage", "unit": "V"},
        {"name": "speed_cmd", "unit": "m/s"},
    ],
    "action_space": {"kind": "discrete", "actions": ["proceed", "creep", "hold"]},
    "log_mapping": {
        "step_rate_hz": 10,
        "max_age_s": 0.1,
        "topics": {"/odom": {"resample": "linear"}},
        "features": {
            "speed": {"topic": "/odom", "field": "twist.twist.linear.x"},
            "aisle_x": {"topic": "/odom", "field": "pose.pose.position.x"},
            "yaw_rate": {"topic": "/imu", "field": "angular_velocity.z"},
            "wheel_speed": {"topic": "/joint_states", "field": "velocity[1]"},
            "range": {"topic": "/range", "field": "range"},
            "voltage": {"topic": "/battery", "field": "voltage"},
            "speed_cmd": {"topic": "/cmd_vel", "field": "linear.x"},
        },
        "learner_action": {"topic": "/policy/action", "field": "data"},
        "learner_probs": {"topic": "/policy/probs", "field": "data"},
        "expert_action": {"topic": "/teleop/action", "field": "data"},
        "control": {
            "topic": "/mode",
            "field": "data",
            "values": {"AUTO": "learner", "MANUAL": "expert"},
        },
    },
}


def messages(storage: Storage, n: int, rate_hz: int = RATE_HZ) -> Any:
    """n messages, 10 topics in turn, each topic at `rate_hz` (100 Hz: n / 1000 seconds)."""
    ts = typestore_for(storage)
    T = ts.types
    ros1 = storage == "ros1"
    rng = np.random.default_rng(7)
    vec = T["geometry_msgs/msg/Vector3"]
    names = list(TOPICS)
    start = 1_700_000_000 * NS
    period = NS // rate_hz
    for i in range(n):
        topic = names[i % 10]
        k = i // 10
        t = start + k * period + (i % 10) * 1000
        time_msg = T["builtin_interfaces/msg/Time"](sec=t // NS, nanosec=t % NS)
        head = (
            T["std_msgs/msg/Header"](seq=k, stamp=time_msg, frame_id="base")
            if ros1
            else T["std_msgs/msg/Header"](stamp=time_msg, frame_id="base")
        )
        value = float(rng.standard_normal())
        if topic == "/odom":
            pose = T["geometry_msgs/msg/PoseWithCovariance"](
                pose=T["geometry_msgs/msg/Pose"](
                    position=T["geometry_msgs/msg/Point"](x=k * 0.01, y=0.0, z=0.0),
                    orientation=T["geometry_msgs/msg/Quaternion"](x=0.0, y=0.0, z=0.0, w=1.0),
                ),
                covariance=np.zeros(36),
            )
            twist = T["geometry_msgs/msg/TwistWithCovariance"](
                twist=T["geometry_msgs/msg/Twist"](
                    linear=vec(x=1 + value, y=0, z=0), angular=vec(x=0, y=0, z=0)
                ),
                covariance=np.zeros(36),
            )
            msg = T["nav_msgs/msg/Odometry"](
                header=head, child_frame_id="base", pose=pose, twist=twist
            )
        elif topic == "/imu":
            q = T["geometry_msgs/msg/Quaternion"](x=0.0, y=0.0, z=0.0, w=1.0)
            msg = T["sensor_msgs/msg/Imu"](
                header=head,
                orientation=q,
                orientation_covariance=np.zeros(9),
                angular_velocity=vec(x=0, y=0, z=value),
                angular_velocity_covariance=np.zeros(9),
                linear_acceleration=vec(x=0, y=0, z=9.81),
                linear_acceleration_covariance=np.zeros(9),
            )
        elif topic == "/joint_states":
            msg = T["sensor_msgs/msg/JointState"](
                header=head,
                name=["left", "right"],
                position=np.zeros(2),
                velocity=np.array([value, -value]),
                effort=np.zeros(2),
            )
        elif topic == "/range":
            msg = T["sensor_msgs/msg/Range"](
                header=head,
                radiation_type=0,
                field_of_view=0.1,
                min_range=0.0,
                max_range=20.0,
                range=abs(value) * 5,
            )
        elif topic == "/battery":
            msg = _battery(T, head, 48 + value, ros1)
        elif topic == "/mode":
            msg = T["std_msgs/msg/String"](data="MANUAL" if (k // 500) % 10 == 9 else "AUTO")
        elif topic in ("/policy/action", "/teleop/action"):
            msg = T["std_msgs/msg/Int32"](data=k % 3)
        elif topic == "/policy/probs":
            probs = np.array([0.2, 0.3, 0.5], dtype=np.float32)[np.roll(np.arange(3), k)]
            layout = T["std_msgs/msg/MultiArrayLayout"](dim=[], data_offset=0)
            msg = T["std_msgs/msg/Float32MultiArray"](layout=layout, data=probs)
        else:
            msg = T["geometry_msgs/msg/Twist"](
                linear=vec(x=1.0, y=0, z=0), angular=vec(x=0, y=0, z=0)
            )
        yield topic, t, msg


def _battery(T: Any, head: Any, voltage: float, ros1: bool) -> Any:
    fields = dict(
        header=head,
        voltage=voltage,
        current=0.0,
        charge=0.0,
        capacity=0.0,
        design_capacity=0.0,
        percentage=0.5,
        power_supply_status=0,
        power_supply_health=0,
        power_supply_technology=0,
        present=True,
        cell_voltage=np.zeros(0, np.float32),
        location="",
        serial_number="",
    )
    if not ros1:
        fields |= {"temperature": 20.0, "cell_temperature": np.zeros(0, np.float32)}
    return T["sensor_msgs/msg/BatteryState"](**fields)


def write(folder: Path, storage: Storage, n: int, rate_hz: int) -> Path:
    ts = typestore_for(storage)
    if storage == "ros1":
        return write_bag(folder / "bench.bag", "ros1", TOPICS, messages(storage, n, rate_hz), ts)
    bag = write_bag(folder / "bench", storage, TOPICS, messages(storage, n, rate_hz), ts)
    return storage_file(bag)


def rss_mb() -> float:
    """This process's resident memory now (Linux /proc)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    raise RuntimeError("no VmRSS in /proc/self/status")


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def phase_read(path: Path) -> dict[str, float]:
    from rosbags.highlevel import AnyReader

    from expertloop.ingest.logs.reader import standard_types

    idle = rss_mb()
    began, cpu = time.perf_counter(), time.process_time()
    count = 0
    with AnyReader([path], default_typestore=standard_types(path.suffix == ".bag")) as reader:
        for connection, _, raw in reader.messages():
            reader.deserialize(raw, connection.msgtype)
            count += 1
    return {
        "seconds": time.perf_counter() - began,
        "cpu_seconds": time.process_time() - cpu,
        "messages": count,
        "idle_rss_mb": idle,
    }


def phase_ingest(path: Path, folder: Path) -> dict[str, float]:
    from expertloop.db import make_engine, make_session_factory
    from expertloop.ingest import service
    from expertloop.loops import service as loops_service
    from expertloop.loops.schemas import LoopCreate
    from expertloop.migrations_state import upgrade

    url = f"sqlite:///{folder / 'store.db'}"
    upgrade(url)
    factory = make_session_factory(make_engine(url))
    with factory() as session:
        loop = loops_service.create_loop(
            session, spec=LoopCreate.model_validate(SPEC), user_id=None
        )
        rnd = loops_service.open_round(session, loop=loop, learner_version="v1", user_id=None)
        session.commit()
        with path.open("rb") as handle:  # in pieces, as the upload spool does
            digest = hashlib.file_digest(handle, "sha256").hexdigest()
        idle = rss_mb()
        began, cpu = time.perf_counter(), time.process_time()
        outcome = service.ingest_file(
            session,
            loop=loop,
            rnd=rnd,
            path=path,
            filename=path.name,
            file_sha256=digest,
            user_id=None,
            blob_dir=folder / "blobs",
        )
        seconds, cpu_seconds = time.perf_counter() - began, time.process_time() - cpu
    return {
        "seconds": seconds,
        "cpu_seconds": cpu_seconds,
        "steps": outcome.n_steps,
        "rollouts": len(outcome.rollouts),
        "idle_rss_mb": idle,
    }


def run_phase(phase: str, path: Path, folder: Path) -> dict[str, float]:
    done = subprocess.run(
        [sys.executable, __file__, "--phase", phase, "--bag", str(path), "--folder", str(folder)],
        check=True,
        capture_output=True,
        text=True,
    )
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--messages", type=int, default=1_000_000)
    parser.add_argument("--storage", choices=["mcap", "sqlite3", "ros1"], default="mcap")
    parser.add_argument("--repeat", type=int, default=1)
    parser.add_argument(
        "--topic-hz",
        type=int,
        default=RATE_HZ,
        help="each topic's rate; 4x the messages at 4x the rate give the same steps",
    )
    parser.add_argument(
        "--keep", type=Path, help="write the bag into this folder and reuse it on later runs"
    )
    parser.add_argument("--phase", choices=["read", "ingest"], help=argparse.SUPPRESS)
    parser.add_argument("--bag", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--folder", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.phase:
        result = (
            phase_read(args.bag) if args.phase == "read" else phase_ingest(args.bag, args.folder)
        )
        result["peak_rss_mb"] = peak_rss_mb()
        print(json.dumps(result))
        return
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        began = time.perf_counter()
        name = f"{args.storage}-{args.messages}" + (
            f"-{args.topic_hz}hz" if args.topic_hz != RATE_HZ else ""
        )
        bag_folder = args.keep / name if args.keep else folder
        found = sorted(bag_folder.glob("bench*")) if args.keep else []
        if found and found[0].is_file():
            path = found[0]
        elif found:
            path = storage_file(found[0])
        else:
            bag_folder.mkdir(parents=True, exist_ok=True)
            path = write(bag_folder, args.storage, args.messages, args.topic_hz)
        size_mb = path.stat().st_size / 1e6
        print(
            f"bag of {args.messages} messages over 10 topics at {args.topic_hz} Hz each "
            f"({args.storage}, {size_mb:.0f} MB) "
            f"ready in {time.perf_counter() - began:.0f} s"
        )
        for run in range(args.repeat):
            read = run_phase("read", path, folder / f"r{run}")
            (folder / f"i{run}").mkdir()
            ingest = run_phase("ingest", path, folder / f"i{run}")
            read_rate = args.messages / read["seconds"]
            ingest_rate = args.messages / ingest["seconds"]
            cpu_ratio = read["cpu_seconds"] / ingest["cpu_seconds"]
            print(
                f"run {run + 1}: read+decode {read_rate:,.0f} msg/s "
                f"(peak {_memory(read)}); ingest {ingest_rate:,.0f} msg/s "
                f"({ingest['steps']:.0f} steps, {ingest['rollouts']:.0f} rollouts; peak "
                f"{_memory(ingest)}); ratio {ingest_rate / read_rate:.2f}x "
                f"(target >= 0.5x), by CPU time {cpu_ratio:.2f}x",
                flush=True,
            )


def _memory(result: dict[str, float]) -> str:
    above = result["peak_rss_mb"] - result["idle_rss_mb"]
    return f"{result['peak_rss_mb']:.0f} MB, {above:.0f} MB above idle"


if __name__ == "__main__":
    main()
