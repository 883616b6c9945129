"""The dry run of a robot log: its topics, rates and message types, and what a loop's log
mapping would make of it (steps, rollouts, dropped steps, missing values), storing nothing."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from pydantic import ValidationError

from ...errors import ExpertloopError
from ...loops.log_mapping import LogMapping
from ...loops.spec import LoopSpec, parse_spec
from .archive import DEFAULT_MAX_UNPACKED_BYTES, bag_format, bag_path, log_stem
from .reader import NS, open_bag
from .service import check_mapped, default_control
from .steps import map_log


@dataclass
class TopicSummary:
    name: str
    msgtype: str
    messages: int
    rate_hz: float | None  # messages per second between the first and last message


@dataclass
class Inspection:
    """What the dry run found."""

    file_format: str
    duration_s: float
    topics: list[TopicSummary]
    grid_steps: int = 0
    rollouts: dict[str, int] = field(default_factory=dict)
    robots: dict[str, str] = field(default_factory=dict)  # rollout -> robot, where mapped
    dropped: dict[str, int] = field(default_factory=dict)
    absent: dict[str, int] = field(default_factory=dict)
    short_segments: int = 0
    verdict: str | None = None  # None: no mapping given


def inspect_log(
    path: Path,
    *,
    filename: str | None = None,
    loop: dict[str, Any] | None = None,
    round_number: int = 1,
    spool_dir: Path,
    max_unpacked_bytes: int = DEFAULT_MAX_UNPACKED_BYTES,
) -> Inspection:
    """Read a log (and, given a loop spec with a log mapping, map and validate it).

    Raises ExpertloopError naming the part of `loop` that is not valid (its log mapping, or the
    features and action space the mapped steps are checked against) before the log is read.
    """
    name = filename or path.name
    parsed = _mapping_and_spec(loop)
    file_format = bag_format(path, name)
    if file_format is None:
        raise ExpertloopError(f"'{name}' is not a robot log (.mcap, .db3, .bag, .zip or .tar)")
    with bag_path(path, file_format, spool_dir, max_unpacked_bytes) as bag_file:
        with open_bag(bag_file) as bag:
            spans = bag.log_spans()
            topics = [
                TopicSummary(topic, msgtype, count, _rate(*spans.get(topic, (0, 0, 0))))
                for topic, (msgtype, count) in sorted(bag.topics().items())
            ]
            found = Inspection(file_format, bag.reader.duration / NS, topics)
            if parsed is None:
                return found
            log_mapping, spec = parsed
            try:
                mapped = map_log(
                    bag,
                    log_mapping,
                    stem=log_stem(name),
                    default_control=default_control(round_number),
                    take_images=False,
                )
            except ExpertloopError as exc:
                found.verdict = f"refused: {exc.message}"
                return found
        found.grid_steps = mapped.grid_steps
        found.dropped, found.absent = mapped.dropped, mapped.absent
        found.short_segments = mapped.short_segments
        keys, counts = np.unique(np.asarray(mapped.row_key, dtype=object), return_counts=True)
        found.rollouts = {str(k): int(c) for k, c in zip(keys, counts, strict=True)}
        if mapped.table is not None and "robot" in mapped.table.column_names:
            # a rollout's robot is its first step's, as stored
            robots = mapped.table.column("robot").to_pylist()
            for key, robot in zip(mapped.row_key, robots, strict=True):
                found.robots.setdefault(key, robot)
        try:
            check_mapped(mapped, spec, round_number=round_number)
        except ExpertloopError as exc:
            found.verdict = f"refused: {exc.message}"
        else:
            found.verdict = "accepted"
    return found


def _mapping_and_spec(loop: dict[str, Any] | None) -> tuple[LogMapping, LoopSpec] | None:
    """The log mapping and the spec parts validation needs (its settings play no part in a dry
    run); None when no mapping is given."""
    if loop is None:
        return None
    if not isinstance(loop, dict):
        raise ExpertloopError("a loop spec is a JSON object with features and action_space")
    mapping = loop.get("log_mapping")
    if not mapping:
        return None
    try:
        log_mapping = LogMapping.model_validate(mapping)
    except ValidationError as exc:
        raise ExpertloopError(f"the log_mapping is not valid:\n{exc}") from None
    try:
        spec = parse_spec(loop.get("features") or [], loop.get("action_space") or {})
    except ValidationError as exc:
        raise ExpertloopError(
            f"the loop's features or action_space are not valid:\n{exc}"
        ) from None
    return log_mapping, spec


def _rate(count: int, first_ns: int, last_ns: int) -> float | None:
    if count < 2 or last_ns == first_ns:
        return None
    return float((count - 1) / ((last_ns - first_ns) / NS))


def report_lines(found: Inspection, *, loop_slug: str | None) -> list[str]:
    """The dry run as lines of text for the terminal."""
    lines = [
        f"{found.file_format}: {found.duration_s:.2f} s, "
        f"{sum(t.messages for t in found.topics)} messages on {len(found.topics)} topics",
        f"  {'topic':<32} {'messages':>9} {'rate Hz':>8}  type",
    ]
    for t in found.topics:
        rate = "-" if t.rate_hz is None else f"{t.rate_hz:.2f}"
        lines.append(f"  {t.name:<32} {t.messages:>9} {rate:>8}  {t.msgtype}")
    if found.verdict is None:
        lines.append("no log mapping given: pass --loop SLUG or --spec FILE to see the steps")
        return lines
    lines.append(f"log mapping of {loop_slug or 'the spec'}:")
    lines.append(f"  step grid: {found.grid_steps} steps")
    for key, count in found.rollouts.items():
        robot = f", robot {found.robots[key]}" if key in found.robots else ""
        lines.append(f"  rollout {key}: {count} steps{robot}")
    for source, count in found.dropped.items():
        lines.append(f"  dropped {count} steps: no fresh value from {source}")
    if found.short_segments:
        lines.append(f"  dropped {found.short_segments} segments shorter than min_steps")
    for source, count in found.absent.items():
        lines.append(f"  missing on {count} kept steps (stored as none): {source}")
    lines.append(f"upload would be {found.verdict}")
    return lines
