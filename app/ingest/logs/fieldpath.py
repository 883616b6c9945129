"""Field paths into ROS messages (`twist.twist.linear.x`, `velocity[3]`): parsing, checking
against a message type's definition, and a fast getter for decoded messages."""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from operator import attrgetter, itemgetter
from typing import Any

from rosbags.interfaces import Nodetype

from ...errors import InvalidInput

_TOKEN = re.compile(r"([A-Za-z_][A-Za-z0-9_]*)|\[([0-9]+)\]")
NUMERIC_TYPES = frozenset(
    (
        "bool",
        "byte",
        "char",
        "int8",
        "uint8",
        "int16",
        "uint16",
        "int32",
        "uint32",
        "int64",
        "uint64",
        "float32",
        "float64",
    )
)


@dataclass(frozen=True)
class Leaf:
    """What a field path ends on: a number, text, a list of numbers, or a message."""

    kind: str  # "number" | "text" | "numbers" | "message" | "other"
    length: int | None = None  # fixed length of a list of numbers (0: variable)
    type_name: str = ""


def tokens(path: str) -> list[str | int]:
    """`poses[0].pose.position.x` -> ["poses", 0, "pose", "position", "x"]."""
    out: list[str | int] = []
    for match in _TOKEN.finditer(path):
        name, index = match.groups()
        out.append(name if name is not None else int(index))
    return out


def check(fielddefs: dict[str, Any], msgtype: str, path: str, *, where: str) -> Leaf:
    """Follow `path` through the message definitions; refuse an unknown field naming it."""
    node: tuple[Any, Any] = (Nodetype.NAME, msgtype)
    walked = ""
    for token in tokens(path):
        kind, detail = node
        if isinstance(token, int):
            if kind not in (Nodetype.ARRAY, Nodetype.SEQUENCE):
                raise InvalidInput(
                    f"{where}: '{walked}' is not a list, so [{token}] does not apply"
                )
            subnode, length = detail
            if kind == Nodetype.ARRAY and token >= length:
                raise InvalidInput(f"{where}: '{walked}' has {length} elements, no [{token}]")
            node = subnode
            walked += f"[{token}]"
            continue
        if kind != Nodetype.NAME:
            raise InvalidInput(f"{where}: '{walked}' has no fields, so '.{token}' does not apply")
        fields = dict(fielddefs[detail][1])
        if token not in fields:
            known = ", ".join(fields) or "none"
            at = f"'{walked}' ({detail})" if walked else detail
            raise InvalidInput(f"{where}: {at} has no field '{token}' (fields: {known})")
        node = fields[token]
        walked = f"{walked}.{token}" if walked else token
    return _leaf(node)


def _leaf(node: tuple[Any, Any]) -> Leaf:
    kind, detail = node
    if kind == Nodetype.BASE:
        type_name = detail[0]
        if type_name in NUMERIC_TYPES:
            return Leaf("number", type_name=type_name)
        if type_name in ("string", "wstring"):
            return Leaf("text", type_name=type_name)
        return Leaf("other", type_name=type_name)
    if kind in (Nodetype.ARRAY, Nodetype.SEQUENCE):
        (sub_kind, sub_detail), length = detail
        if sub_kind == Nodetype.BASE and sub_detail[0] in NUMERIC_TYPES:
            return Leaf("numbers", length if kind == Nodetype.ARRAY else 0, sub_detail[0])
        return Leaf("other", type_name="list")
    return Leaf("message", type_name=str(detail))


def getter(path: str) -> Callable[[Any], Any]:
    """A function from a decoded message to the value at `path` (attrgetter where it can)."""
    steps: list[Callable[[Any], Any]] = []
    names: list[str] = []
    for token in tokens(path):
        if isinstance(token, int):
            if names:
                steps.append(attrgetter(".".join(names)))
                names = []
            steps.append(itemgetter(token))
        else:
            names.append(token)
    if names:
        steps.append(attrgetter(".".join(names)))
    if len(steps) == 1:
        return steps[0]

    def get(message: Any) -> Any:
        value = message
        for step in steps:
            value = step(value)
        return value

    return get
