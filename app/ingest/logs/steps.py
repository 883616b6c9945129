"""From a bag's mapped topics to the rollout file contract's columns: the step grid, each
source resampled onto it, missing values dropped or refused, rollouts split, images taken.

The result is the same Arrow table the Parquet, .npz and JSON Lines readers give, so validation
and storage are the ones every upload goes through.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa

from ...errors import InvalidInput
from ...loops.log_mapping import (
    ContinuousActionSource,
    DiscreteActionSource,
    FieldSource,
    LogMapping,
    RobotFromFileName,
    RobotFromValue,
    RobotSource,
)
from .gridding import OnGrid, stream_onto_grid
from .images import frame_bytes
from .reader import NS, Bag, describe_time


@dataclass
class MappedLog:
    """A bag as contract columns, with where each row and column came from (for messages)."""

    table: pa.Table | None
    row_time_ns: np.ndarray
    row_key: list[str]
    column_sources: dict[str, str]
    start_ns: int
    grid_steps: int = 0
    dropped: dict[str, int] = field(default_factory=dict)
    absent: dict[str, int] = field(default_factory=dict)
    short_segments: int = 0


@dataclass
class _Resampled:
    values: np.ndarray  # (grid, ...) float64, or object for text
    fresh: np.ndarray  # (grid,) bool: a value no older than the max age
    age_ns: np.ndarray


def map_log(
    bag: Bag,
    mapping: LogMapping,
    *,
    stem: str,
    default_control: str,
    take_images: bool = True,
    chunk: int | None = None,
) -> MappedLog:
    """Read the bag through the mapping into contract columns (rows in rollout, step order);
    `chunk`: messages a topic holds before they are settled onto the grid (default CHUNK)."""
    on_grid = stream_onto_grid(bag, mapping, chunk=chunk)
    grid = on_grid.steps
    out = MappedLog(None, np.zeros(0, np.int64), [], _column_sources(mapping), bag.start_ns)
    out.grid_steps = len(grid)

    def resampled(name: str, source: FieldSource) -> _Resampled:
        """A source at every step, fresh where no older than its topic's max age (how it was
        resampled: `gridding._hows`)."""
        values, age = on_grid.source(source.topic, name)
        return _fresh(values, age, mapping.rule(source.topic).max_age_s)

    keep = np.ones(len(grid), dtype=bool)

    def require(name: str, source: FieldSource, fresh: np.ndarray, where: np.ndarray) -> None:
        missing = where & ~fresh & keep
        if not missing.any():
            return
        if mapping.on_missing == "refuse":
            i = int(np.flatnonzero(missing)[0])
            raise InvalidInput(
                f"{source.describe()}: no value within {mapping.rule(source.topic).max_age_s:g} s "
                f"of the step at {describe_time(int(grid[i]), bag.start_ns)} "
                "(the mapping refuses steps with missing values)"
            )
        out.dropped[source.describe()] = int(missing.sum())
        keep[missing] = False

    features = np.empty((len(grid), len(mapping.features)), dtype=np.float64)
    everywhere = np.ones(len(grid), dtype=bool)
    for j, (name, source) in enumerate(mapping.features.items()):
        r = resampled(f"feature:{name}", source)
        require(f"feature:{name}", source, r.fresh, everywhere)
        features[:, j] = r.values * source.scale

    control = np.full(len(grid), default_control, dtype=object)
    if mapping.control is not None:
        r = resampled("control", mapping.control)
        require("control", mapping.control, r.fresh, everywhere)
        control = _lookup(r.values, keep, mapping.control, grid, bag.start_ns, "control")
    is_expert = control == "expert"

    actions: dict[str, Any] = {}
    for name, on_steps in (("learner_action", ~is_expert), ("expert_action", is_expert)):
        source = getattr(mapping, name)
        if source is not None:
            actions[name] = _action(name, source, resampled, require, on_steps, keep, grid, bag)

    optional: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for name in ("learner_probs", "learner_ensemble", "learner_std"):
        source = getattr(mapping, name)
        if source is not None:
            r = resampled(name, source)
            out.absent[source.describe()] = int((~r.fresh & keep).sum())
            if r.fresh.any():  # a topic without a single fresh value gives no column
                optional[name] = (_stack(r.values, r.fresh, source, name), r.fresh)

    scene = None
    if mapping.scene is not None:
        r = _fresh(*on_grid.source(mapping.scene.topic, "scene"), mapping.scene.max_age_s)
        scene = r.values.copy()
        scene[~r.fresh] = None
        out.absent[f"topic {mapping.scene.topic} (scene)"] = int((~r.fresh & keep).sum())

    rows = np.flatnonzero(keep)
    bounds = _segments(rows, control, grid, mapping)
    segments = [seg for seg in bounds if len(seg) >= mapping.rollouts.min_steps]
    out.short_segments = len(bounds) - len(segments)
    if not segments:
        return out
    order = np.concatenate(segments)
    first_rows = [seg[0] for seg in segments]
    step = np.concatenate([seg - seg[0] for seg in segments])
    # steps count grid periods from the rollout's first step, so dropped steps leave gaps
    width = max(3, len(str(len(bounds))))
    keys = (
        [stem]
        if mapping.rollouts.split == "bag"
        else [
            f"{stem}-{k + 1:0{width}d}"
            for k, seg in enumerate(bounds)
            if len(seg) >= mapping.rollouts.min_steps
        ]
    )
    row_key = [key for key, seg in zip(keys, segments, strict=True) for _ in range(len(seg))]
    start_of_row = np.concatenate(
        [
            np.full(len(seg), grid[first], dtype=np.int64)
            for seg, first in zip(segments, first_rows, strict=True)
        ]
    )
    columns: dict[str, pa.Array] = {
        "rollout": pa.array(row_key, type=pa.string()),
        "step": pa.array(step.astype(np.int64)),
        "time_s": pa.array((grid[order] - start_of_row) / NS),
        "features": _fixed(features[order]),
    }
    _check_finite(features[order], mapping, grid[order], bag.start_ns)
    if mapping.control is not None:
        columns["control"] = pa.array(control[order].tolist(), type=pa.string())
    for name, value in actions.items():
        columns[name] = _action_column(value, order)
    for name, (values, fresh) in optional.items():
        columns[name] = _fixed(values[order], present=fresh[order])
    if scene is not None:
        columns["scene"] = pa.array(scene[order].tolist(), type=pa.string())
    if mapping.robot is not None:
        columns["robot"] = _robot(mapping.robot, stem, on_grid, order, bag.start_ns)
    if mapping.image is not None and take_images:
        columns["image"] = _images(bag, mapping, on_grid, order, out)
    out.table = pa.table(columns)
    out.row_time_ns = grid[order]
    out.row_key = row_key
    return out


def _fresh(values: np.ndarray, age: np.ndarray, max_age_s: float | None) -> _Resampled:
    return _Resampled(values, age <= int(round((max_age_s or 0.0) * NS)), age)


def _raw_key(value: Any) -> str:
    """A raw mode or action value as the text a mapping's `values` use: 2 -> "2", True -> "true"."""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (int, float, np.number)) and float(value).is_integer():
        return str(int(value))
    return str(value)


def _lookup(
    values: np.ndarray,
    keep: np.ndarray,
    source: Any,
    grid: np.ndarray,
    start_ns: int,
    what: str,
) -> np.ndarray:
    """Raw values at the kept steps through the mapping's `values` table."""
    out = np.full(len(values), None, dtype=object)
    table: dict[str, str] = source.values
    for i in np.flatnonzero(keep):
        key = _raw_key(values[i])
        if key not in table:
            raise InvalidInput(
                f"{source.describe()}: value '{key}' at {describe_time(int(grid[i]), start_ns)} "
                f"is not in the mapping's {what} values ({', '.join(table)})"
            )
        out[i] = table[key]
    return out


def _action(name, source, resampled, require, on_steps, keep, grid, bag):  # type: ignore[no-untyped-def]
    """A discrete action (names or indexes per step) or a continuous one ((grid, dims), fresh)."""
    if isinstance(source, ContinuousActionSource):
        parts, fresh = [], np.ones(len(grid), dtype=bool)
        for dim, dim_source in source.dimensions.items():
            r = resampled(f"{name}:{dim}", dim_source)
            require(f"{name}:{dim}", dim_source, r.fresh, on_steps)
            parts.append(np.where(r.fresh, r.values, 0.0).astype(np.float64))
            fresh &= r.fresh
        return np.stack(parts, axis=1), fresh
    assert isinstance(source, DiscreteActionSource)
    r = resampled(name, source)
    require(name, source, r.fresh, on_steps)
    usable = keep & r.fresh
    if source.values:
        values = _lookup(r.values, usable, source, grid, bag.start_ns, "action")
    else:
        values = np.full(len(grid), None, dtype=object)
        for i in np.flatnonzero(usable):
            raw = r.values[i]
            if isinstance(raw, str):
                values[i] = raw
            elif float(raw).is_integer():
                values[i] = int(raw)
            else:
                raise InvalidInput(
                    f"{source.describe()}: value {raw} at "
                    f"{describe_time(int(grid[i]), bag.start_ns)} is neither an action index nor a "
                    "name (map raw values with `values`)"
                )
    return values, usable


def _action_column(value: tuple[np.ndarray, np.ndarray], order: np.ndarray) -> pa.Array:
    values, fresh = value
    if values.ndim == 2:
        return _fixed(values[order], present=fresh[order])
    picked = [v if f else None for v, f in zip(values[order].tolist(), fresh[order], strict=True)]
    return pa.array(picked)


def _stack(values: np.ndarray, fresh: np.ndarray, source: Any, name: str) -> np.ndarray:
    """Per-step lists of numbers as a (grid, width) array (ensembles: (grid, members, width))."""
    if values.dtype == object:
        widths = sorted({len(v) for v in values if v is not None})
        raise InvalidInput(
            f"{source.describe()} ({name}): the list's length changes between messages ({widths})"
        )
    if name == "learner_ensemble":
        members = source.members
        if values.shape[1] % members:
            raise InvalidInput(
                f"{source.describe()} (learner_ensemble): {values.shape[1]} values do not split "
                f"into {members} members"
            )
        return values.reshape(len(values), members, -1)
    return values


def _fixed(values: np.ndarray, present: np.ndarray | None = None) -> pa.Array:
    """A (n, width) or (n, members, width) array as fixed-size list column (null where absent)."""
    flat = pa.array(np.ascontiguousarray(values, dtype=np.float64).reshape(-1))
    inner_width = values.shape[-1]
    array: pa.Array = pa.FixedSizeListArray.from_arrays(flat, inner_width)
    if values.ndim == 3:
        array = pa.FixedSizeListArray.from_arrays(array, values.shape[1])
    if present is not None and not present.all():
        array = pa.FixedSizeListArray.from_arrays(
            array.values, array.type.list_size, mask=pa.array(~present)
        )
    return array


def _check_finite(
    features: np.ndarray, mapping: LogMapping, times: np.ndarray, start_ns: int
) -> None:
    bad = ~np.isfinite(features)
    if bad.any():
        i, j = (int(v[0]) for v in np.nonzero(bad))
        name = list(mapping.features)[j]
        raise InvalidInput(
            f"{mapping.features[name].describe()} (feature {name}): value {features[i, j]} at "
            f"{describe_time(int(times[i]), start_ns)} is not finite"
        )


def _segments(
    rows: np.ndarray, control: np.ndarray, grid: np.ndarray, mapping: LogMapping
) -> list[np.ndarray]:
    """Kept grid rows split into rollouts: the whole bag, or at mode changes and long gaps."""
    if len(rows) == 0:
        return []
    split = mapping.rollouts
    if split.split == "bag":
        return [rows]
    cut = np.zeros(len(rows) - 1, dtype=bool)
    if split.on_mode_change and mapping.control is not None:
        cut |= control[rows[1:]] != control[rows[:-1]]
    if split.gap_s is not None:
        cut |= (grid[rows[1:]] - grid[rows[:-1]]) > round(split.gap_s * NS)
    return np.split(rows, np.flatnonzero(cut) + 1)


def _images(
    bag: Bag, mapping: LogMapping, on_grid: OnGrid, order: np.ndarray, out: MappedLog
) -> pa.Array:
    """The nearest frame to each row within the image's max age, read in a second pass."""
    assert mapping.image is not None
    topic = mapping.image.topic
    nearest, distance = on_grid.source(topic, "image")
    nearest, distance = nearest[order], distance[order]
    frames: list[bytes | None] = [None] * len(order)
    close = distance <= round(mapping.image.max_age_s * NS)
    wanted: dict[int, list[int]] = {}
    stamps: dict[int, int] = {}
    for close_row in np.flatnonzero(close):
        number, stamp = (int(v) for v in nearest[close_row])
        wanted.setdefault(number, []).append(int(close_row))
        stamps[number] = stamp
    msgtype = on_grid.topics[topic].msgtype
    for number, message in bag.frames(topic, wanted):
        where = f"topic {topic} at {describe_time(stamps[number], bag.start_ns)}"
        frame = frame_bytes(message, msgtype, where=where)
        for row in wanted[number]:
            frames[row] = frame
    out.absent[f"topic {topic} (image)"] = int((~close).sum())
    return pa.array(frames, type=pa.binary())


def _robot(
    source: RobotSource, stem: str, on_grid: OnGrid, order: np.ndarray, start_ns: int
) -> pa.Array:
    """Each row's robot name: the mapping's value, a part of the file's name, or a part of a
    topic's field held at the row's step (the first message's before any came)."""
    if isinstance(source, RobotFromValue):
        return pa.array(np.full(len(order), source.value, dtype=object), type=pa.string())
    if isinstance(source, RobotFromFileName):
        try:
            name = source.pick(stem)
        except ValueError as exc:
            raise InvalidInput(f"log_mapping.robot: {source.describe()}: {exc}") from exc
        return pa.array(np.full(len(order), name, dtype=object), type=pa.string())
    if on_grid.topics[source.topic].taken == 0:
        raise InvalidInput(
            f"log_mapping.robot: topic {source.topic}: the bag holds no messages on it"
        )
    values, _ = on_grid.source(source.topic, "robot")
    names: dict[str, str] = {}
    rows: list[str] = []
    for row in order:
        raw = _raw_key(values[row])
        if raw not in names:
            try:
                names[raw] = source.pick(raw)
            except ValueError as exc:
                when = describe_time(int(on_grid.steps[row]), start_ns)
                raise InvalidInput(f"{source.describe()}, at {when}: {exc}") from exc
        rows.append(names[raw])
    return pa.array(rows, type=pa.string())


def _column_sources(mapping: LogMapping) -> dict[str, str]:
    """The mapping's source of each contract column, as refusals name it."""
    out = {
        "features": "features (" + "; ".join(s.describe() for s in mapping.features.values()) + ")"
    }
    for name in ("learner_action", "expert_action"):
        source = getattr(mapping, name)
        if isinstance(source, ContinuousActionSource):
            out[name] = "; ".join(s.describe() for s in source.dimensions.values())
            out |= {f"{name}:{d}": s.describe() for d, s in source.dimensions.items()}
        elif source is not None:
            out[name] = source.describe()
        else:
            out[name] = f"no {name} in the log mapping"
    for name in ("learner_probs", "learner_ensemble", "learner_std", "control"):
        source = getattr(mapping, name)
        out[name] = source.describe() if source is not None else f"no {name} in the log mapping"
    if mapping.scene is not None:
        out["scene"] = f"topic {mapping.scene.topic}"
    if mapping.image is not None:
        out["image"] = f"topic {mapping.image.topic}"
    if mapping.robot is not None:
        out["robot"] = f"robot from {mapping.robot.describe()}"
    return out
