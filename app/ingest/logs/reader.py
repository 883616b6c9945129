"""Read the topics a log mapping needs from a bag as one stream in time order, keeping only
the mapped values of each message (never the bag, never whole messages), handed on in chunks of
a bounded number of messages per topic.

rosbags decodes every message: types come from the definitions stored in the bag, and where a
bag stores none (ROS 2 SQLite bags before Iron), from rosbags' standard message set.
"""

from __future__ import annotations

import json
from array import array
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from operator import attrgetter
from pathlib import Path
from typing import Any

import numpy as np
from rosbags.highlevel import AnyReader
from rosbags.interfaces import Connection, Nodetype
from rosbags.typesys import Stores, get_types_from_msg, get_typestore
from rosbags.typesys.store import Typestore

from ...errors import ExpertloopError, InvalidInput
from ...loops.log_mapping import FieldSource, LogMapping, SceneSource
from . import fieldpath

# Our own scene message, documented in the README ("Robot logs"): a bag may carry it with its
# definition, or without one (then this definition decodes it).
SCENE_TYPE = "expertloop_msgs/msg/Scene"
SCENE_AGENT_TYPE = "expertloop_msgs/msg/SceneAgent"
SCENE_DEFINITIONS = {
    SCENE_AGENT_TYPE: "string kind\nfloat64 x\nfloat64 y\nfloat64 heading\n",
    SCENE_TYPE: f"string frame\n{SCENE_AGENT_TYPE}[] agents\n",
}
IMAGE_TYPES = ("sensor_msgs/msg/Image", "sensor_msgs/msg/CompressedImage")
NS = 1_000_000_000


def standard_types(ros1: bool) -> Typestore:
    """rosbags' standard message set (ROS 1 Noetic or ROS 2 Humble) plus our scene message."""
    store = get_typestore(Stores.ROS1_NOETIC if ros1 else Stores.ROS2_HUMBLE)
    for name, text in SCENE_DEFINITIONS.items():
        store.register(get_types_from_msg(text, name))
    return store


class UnreadableBag(InvalidInput):
    """The bag library could not read the file."""


@dataclass
class TopicSeries:
    """One topic's messages read since the last chunk was taken: times (ns, the stamp the
    mapping uses) and values by source."""

    topic: str
    msgtype: str
    stamp_field: str  # "header.stamp" or "log time"
    # compact arrays where the values are numbers: 8 bytes a value instead of a Python object
    times: array[int] = field(default_factory=lambda: array("q"))
    values: dict[str, array[float] | list[Any]] = field(default_factory=dict)
    # how a message is read: its stamp (None: the log time) and (getter, buffer, field) by source
    stamp: Callable[[Any], int] | None = None
    getters: list[tuple[Callable[[Any], Any], array[float] | list[Any], str]] = field(
        default_factory=list
    )

    def take(self) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """The buffered times and each source's values (float64 for numbers, else objects),
        emptying the buffers in place (the stream keeps appending to the same ones)."""
        times = np.array(self.times, dtype=np.int64)
        del self.times[:]
        values: dict[str, np.ndarray] = {}
        for name, buffered in self.values.items():
            if isinstance(buffered, array):
                values[name] = np.array(buffered, dtype=np.float64)
                del buffered[:]
            else:
                out = np.empty(len(buffered), dtype=object)
                out[:] = buffered
                values[name] = out
                buffered.clear()
        return times, values

    def last_time(self) -> int | None:
        return self.times[-1] if self.times else None


class Bag:
    """An open bag: its topics, and streams of the mapped values in time order."""

    def __init__(self, reader: AnyReader) -> None:
        self.reader = reader
        self.start_ns = reader.start_time if reader.message_count else 0

    @property
    def is_ros1(self) -> bool:
        return not self.reader.is2

    def topics(self) -> dict[str, tuple[str, int]]:
        """Topic -> (message type, message count) of every topic in the bag."""
        return {
            name: (info.msgtype or "(several types)", info.msgcount)
            for name, info in self.reader.topics.items()
        }

    def connections(self, topic: str) -> list[Connection]:
        return [c for c in self.reader.connections if c.topic == topic]

    def message_type(self, topic: str, mapping_path: str) -> str:
        """The topic's message type, decodable; refuse a missing topic or an unknown type."""
        conns = self.connections(topic)
        if not conns:
            known = ", ".join(sorted(self.reader.topics)[:20]) or "none"
            raise InvalidInput(f"{mapping_path}: topic {topic} is not in the bag (topics: {known})")
        types = {c.msgtype for c in conns}
        if len(types) > 1:
            raise InvalidInput(f"topic {topic} carries several message types: {sorted(types)}")
        msgtype = types.pop()
        self._ensure_type(topic, msgtype)
        return msgtype

    def _ensure_type(self, topic: str, msgtype: str) -> None:
        store = self.reader.typestore
        if msgtype in store.fielddefs:
            return
        standard = standard_types(self.is_ros1)
        if msgtype not in standard.fielddefs:
            raise InvalidInput(
                f"topic {topic}: message type '{msgtype}' is not in the standard message set "
                "and the bag stores no definition for it (record with message definitions, "
                "as ROS 1, MCAP and ROS 2 Iron or newer do)"
            )
        needed: dict[str, Any] = {}
        pending = [msgtype]
        while pending:
            name = pending.pop()
            if name in needed or name in store.fielddefs:
                continue
            needed[name] = standard.fielddefs[name]
            pending += _referenced_types(standard.fielddefs[name][1])
        store.register(needed)

    def prepare(self, mapping: LogMapping) -> dict[str, TopicSeries]:
        """Each mapped topic's (empty) series with how its messages are read, after checking
        its type and every field path: refuses what the bag cannot give before reading."""
        plans: dict[str, TopicSeries] = {}
        sources: list[tuple[str, FieldSource | SceneSource | None, str]] = [
            (name, source, source.topic) for name, source in mapping.value_sources().items()
        ]
        if mapping.scene is not None:
            sources.append(("scene", mapping.scene, mapping.scene.topic))
        if mapping.image is not None:
            sources.append(("image", None, mapping.image.topic))
        for name, source, topic in sources:
            plan = plans.get(topic)
            if plan is None:
                plan = plans[topic] = self._series(topic, mapping)
            msgtype = plan.msgtype
            values: array[float] | list[Any] = []
            if name == "image":
                if msgtype not in IMAGE_TYPES:
                    raise InvalidInput(
                        f"log_mapping.image: topic {topic} carries {msgtype}, not one of "
                        f"{list(IMAGE_TYPES)}"
                    )
                continue  # only the times: frames are read in a second pass
            plan.values[name] = values
            if isinstance(source, SceneSource):
                plan.getters.append((_scene_getter(source, msgtype, topic), values, "scene"))
                continue
            assert isinstance(source, FieldSource)
            where = f"log_mapping.{name.replace(':', '.')}: {source.describe()}"
            leaf = fieldpath.check(
                self.reader.typestore.fielddefs, msgtype, source.field, where=where
            )
            expected = _expected_kinds(name, mapping)
            if leaf.kind not in expected:
                raise InvalidInput(
                    f"{where}: is {leaf.type_name} ({leaf.kind}), expected {' or '.join(expected)}"
                )
            if leaf.kind == "number" and leaf.type_name != "bool":
                values = plan.values[name] = array("d")
            plan.getters.append((fieldpath.getter(source.field), values, source.field))
        return plans

    def _series(self, topic: str, mapping: LogMapping) -> TopicSeries:
        msgtype = self.message_type(topic, f"log_mapping (topic {topic})")
        rule = mapping.rule(topic)
        has_header = "header" in dict(self.reader.typestore.fielddefs[msgtype][1])
        if rule.stamp == "header" and not has_header:
            raise InvalidInput(
                f"log_mapping.topics.{topic}: stamp 'header', but {msgtype} has no header"
            )
        use_header = rule.stamp == "header" or (rule.stamp == "auto" and has_header)
        return TopicSeries(
            topic,
            msgtype,
            "header.stamp" if use_header else "log time",
            stamp=_header_stamp if use_header else None,
        )

    def stream(
        self,
        plans: dict[str, TopicSeries],
        on_chunk: Callable[[TopicSeries], None],
        *,
        chunk: int,
    ) -> None:
        """Read every planned topic's values in one pass in time order. Whenever a topic has
        `chunk` messages buffered, `on_chunk` takes them (`TopicSeries.take`), so at most that
        many a topic are held; what is left stays in the buffers for the caller."""
        wanted = [c for topic in plans for c in self.connections(topic)]
        by_connection = {c.id: plans[c.topic] for c in wanted}
        deserialize = self.reader.deserialize
        messages = self.reader.messages(connections=wanted)
        while True:
            plan: TopicSeries | None = None
            message: Any = None
            try:
                item = next(messages, None)
                if item is None:
                    return
                connection, log_ns, raw = item
                plan = by_connection[connection.id]
                message = deserialize(raw, connection.msgtype)
                plan.times.append(plan.stamp(message) if plan.stamp else log_ns)
                for get, out, _ in plan.getters:
                    out.append(get(message))
            except (IndexError, AttributeError) as exc:
                if plan is None or message is None:  # the reader or decoder failed
                    raise UnreadableBag(
                        f"the bag could not be read (truncated or damaged?): {exc}"
                    ) from exc
                name = next((n for g, o, n in plan.getters if len(o) < len(plan.times)), "")
                raise InvalidInput(
                    f"topic {plan.topic}, field {name}: not in the message at "
                    f"{describe_time(plan.times[-1], self.start_ns)} ({exc})"
                ) from exc
            except (ExpertloopError, MemoryError):
                raise
            except Exception as exc:  # as in damaged_file_errors(), inside this hot loop
                raise UnreadableBag(
                    f"the bag could not be read (truncated or damaged?): {exc}"
                ) from exc
            if len(plan.times) >= chunk:
                on_chunk(plan)

    def first_stamps(self, plans: dict[str, TopicSeries], topics: set[str]) -> dict[str, int]:
        """The stamp of each topic's first message (no entry for a topic without messages),
        reading only until every one of them has spoken."""
        conns = [c for topic in sorted(topics) for c in self.connections(topic)]
        found: dict[str, int] = {}
        with damaged_file_errors():
            for connection, log_ns, raw in self.reader.messages(connections=conns):
                if connection.topic in found:
                    continue
                stamp = plans[connection.topic].stamp
                found[connection.topic] = (
                    log_ns
                    if stamp is None
                    else stamp(self.reader.deserialize(raw, connection.msgtype))
                )
                if len(found) == len(topics):
                    break
        return found

    def frames(self, topic: str, wanted: dict[int, list[int]]) -> Iterator[tuple[int, Any]]:
        """(message number, decoded message) of the topic's messages whose number is wanted."""
        conns = self.connections(topic)
        with damaged_file_errors():
            for number, (connection, _, raw) in enumerate(self.reader.messages(connections=conns)):
                if number in wanted:
                    yield number, self.reader.deserialize(raw, connection.msgtype)

    def log_spans(self) -> dict[str, tuple[int, int, int]]:
        """Every topic's message count and first and last log time (ns), read without decoding
        and without keeping the times (for the dry run's rates)."""
        spans: dict[str, tuple[int, int, int]] = {}
        try:
            for connection, log_ns, _ in self.reader.messages():
                count, first, _ = spans.get(connection.topic, (0, log_ns, log_ns))
                spans[connection.topic] = (count + 1, first, log_ns)
        except Exception as exc:  # a decoder failure means a damaged file
            raise UnreadableBag(
                f"the bag could not be read (truncated or damaged?): {exc}"
            ) from exc
        return spans


_stamp_of = attrgetter("header.stamp")


def _expected_kinds(name: str, mapping: LogMapping) -> tuple[str, ...]:
    """What a source's field must hold: numbers for features and continuous actions, a list
    of numbers for probabilities and the like, a number or text for discrete values, modes and
    robot names."""
    if name in ("learner_probs", "learner_ensemble", "learner_std"):
        return ("numbers",)
    if name in ("control", "learner_action", "expert_action", "robot"):
        return ("number", "text")
    return ("number",)


def _header_stamp(message: Any) -> int:
    stamp = _stamp_of(message)
    return int(stamp.sec) * NS + int(stamp.nanosec)


def _referenced_types(fields: list[tuple[str, Any]]) -> list[str]:
    out = []
    for _, (kind, detail) in fields:
        while kind in (Nodetype.ARRAY, Nodetype.SEQUENCE):
            kind, detail = detail[0]
        if kind == Nodetype.NAME:
            out.append(detail)
    return out


def _scene_getter(source: SceneSource, msgtype: str, topic: str) -> Callable[[Any], Any]:
    if source.format == "json":
        if msgtype != "std_msgs/msg/String":
            raise InvalidInput(
                f"log_mapping.scene: topic {topic} carries {msgtype}; a JSON scene comes as "
                "std_msgs/msg/String"
            )
        return attrgetter("data")
    if msgtype != SCENE_TYPE:
        raise InvalidInput(f"log_mapping.scene: topic {topic} carries {msgtype}, not {SCENE_TYPE}")
    return _scene_json


def _scene_json(message: Any) -> str:
    agents = [
        {"kind": a.kind, "x": float(a.x), "y": float(a.y), "heading": float(a.heading)}
        for a in message.agents
    ]
    return json.dumps({"frame": message.frame, "agents": agents}, separators=(",", ":"))


def describe_time(ns: int, start_ns: int) -> str:
    """A message time as fleet tools show it: seconds into the bag, and the stamp itself."""
    return f"{(ns - start_ns) / NS:.3f} s into the bag (stamp {ns // NS}.{ns % NS:09d})"


@contextmanager
def damaged_file_errors() -> Iterator[None]:
    """Any failure of the third-party reader or decoder inside the block means a damaged file
    (our own refusals and running out of memory pass through as they are)."""
    try:
        yield
    except (ExpertloopError, MemoryError):
        raise
    except Exception as exc:
        raise UnreadableBag(f"the bag could not be read (truncated or damaged?): {exc}") from exc


@contextmanager
def open_bag(path: Path) -> Iterator[Bag]:
    """Open a ROS 1 .bag, a ROS 2 bag folder, or a bare .mcap/.db3 file for reading."""
    ros1 = path.suffix == ".bag"
    with damaged_file_errors():
        reader = AnyReader([path], default_typestore=standard_types(ros1))
        reader.open()
    try:
        yield Bag(reader)
    finally:
        reader.close()
