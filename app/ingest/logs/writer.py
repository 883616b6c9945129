"""Write ROS bags with rosbags' own writers (ROS 2 MCAP or SQLite storage, ROS 1): for the
demo's invented bag, the tests and the benchmark. The service itself only reads bags."""

from __future__ import annotations

from collections.abc import Iterable
from pathlib import Path
from typing import Any, Literal

from rosbags.rosbag1 import Writer as Ros1Writer
from rosbags.rosbag2 import StoragePlugin
from rosbags.rosbag2 import Writer as Ros2Writer
from rosbags.typesys.store import Typestore

from .reader import standard_types

Storage = Literal["mcap", "sqlite3", "ros1"]


def typestore_for(storage: Storage) -> Typestore:
    """The message types a bag of this kind is written with (ROS 1 Noetic or ROS 2 Humble)."""
    return standard_types(ros1=storage == "ros1")


def write_bag(
    path: Path,
    storage: Storage,
    topics: dict[str, str],
    messages: Iterable[tuple[str, int, Any]],
    typestore: Typestore,
) -> Path:
    """Write `messages` ((topic, log time ns, message) in time order) to a new bag at `path`.

    ROS 2 writes a bag folder (metadata.yaml and one storage file); ROS 1 one .bag file.
    Returns the folder or file.
    """
    if storage == "ros1":
        with Ros1Writer(path) as ros1:
            conns = {t: ros1.add_connection(t, m, typestore=typestore) for t, m in topics.items()}
            for topic, stamp, message in messages:
                msgtype = topics[topic]
                ros1.write(conns[topic], stamp, typestore.serialize_ros1(message, msgtype))
        return path
    plugin = StoragePlugin.MCAP if storage == "mcap" else StoragePlugin.SQLITE3
    with Ros2Writer(path, version=9, storage_plugin=plugin) as ros2:
        conns2 = {t: ros2.add_connection(t, m, typestore=typestore) for t, m in topics.items()}
        for topic, stamp, message in messages:
            msgtype = topics[topic]
            ros2.write(conns2[topic], stamp, typestore.serialize_cdr(message, msgtype))
    return path


def storage_file(folder: Path) -> Path:
    """The one storage file (.mcap or .db3) of a ROS 2 bag folder."""
    found = sorted([*folder.glob("*.mcap"), *folder.glob("*.db3")])
    if len(found) != 1:
        raise FileNotFoundError(f"{folder} holds {len(found)} storage files, not one")
    return found[0]
