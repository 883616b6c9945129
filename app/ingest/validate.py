"""Validate a rollout table against a loop's spec and turn it into numpy arrays, sorted by
(rollout, step). Every refusal names the row and column; nothing here touches the store."""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import InvalidInput
from ..limits import shown
from ..loops.spec import LoopSpec
from ..shared.contract import CONTROL_VALUES, PROBABILITY_SUM_TOLERANCE, REQUIRED_COLUMNS
from . import columns as col
from . import limits as upload_limits
from .images import content_digests
from .models import CONTROL_EXPERT, CONTROL_LEARNER

NO_ACTION = -1
DEFAULT_LIMITS = upload_limits.UploadLimits()


@dataclass
class StepBatch:
    """A validated upload, rows sorted by (rollout, step).

    rollout_keys : list of the distinct rollout keys, sorted
    rollout_index : ndarray of shape (n_steps,), index into rollout_keys
    features : ndarray of shape (n_steps, n_features), float32
    learner_action, expert_action : discrete, ndarray of shape (n_steps,) int, NO_ACTION where
        absent; continuous, Vectors of shape (n_steps, n_dims)
    """

    rollout_keys: list[str]
    rollout_index: np.ndarray
    row_number: np.ndarray
    step: np.ndarray
    time_s: np.ndarray
    control: np.ndarray
    features: np.ndarray
    learner_action: np.ndarray | col.Vectors | None
    expert_action: np.ndarray | col.Vectors | None
    learner_probs: col.Vectors | None
    learner_ensemble: col.Vectors | None
    ensemble_size: int
    learner_std: col.Vectors | None
    robot: list[str | None]
    scene: np.ndarray | None
    image: np.ndarray | None

    @property
    def n_steps(self) -> int:
        return len(self.step)

    @cached_property
    def image_sha256(self) -> list[str | None] | None:
        """Each step's image hash (None where it has none), computed once for the rollouts'
        content hashes and the image store alike."""
        return None if self.image is None else content_digests(self.image)

    def rollout_slices(self) -> list[slice]:
        """The row range of each rollout (rows are sorted by rollout)."""
        bounds = np.flatnonzero(np.diff(self.rollout_index)) + 1
        starts = np.concatenate([[0], bounds])
        stops = np.concatenate([bounds, [self.n_steps]])
        return [slice(int(a), int(b)) for a, b in zip(starts, stops, strict=True)]


@dataclass
class RowColumns:
    """One table's validated columns in the table's own row order (unsorted).

    keys : ndarray of shape (n,), object: the rollout keys
    robot, scene, image : ndarray of shape (n,), object (None where absent), or None when the
        table has no such column
    The other fields are as in StepBatch; an optional column the table lacks is None.
    """

    keys: np.ndarray
    step: np.ndarray
    time_s: np.ndarray
    control: np.ndarray
    features: np.ndarray
    learner_action: np.ndarray | col.Vectors | None
    expert_action: np.ndarray | col.Vectors | None
    learner_probs: col.Vectors | None
    learner_ensemble: col.Vectors | None
    ensemble_size: int
    learner_std: col.Vectors | None
    robot: np.ndarray | None
    scene: np.ndarray | None
    image: np.ndarray | None


def validate_rows(
    table: pa.Table,
    spec: LoopSpec,
    *,
    round_number: int,
    limits: upload_limits.UploadLimits = DEFAULT_LIMITS,
) -> RowColumns:
    """Check every value of a rollout table against the loop spec, row by row (rows named from
    1 at the table's first row); the checks across rows (order, repeats) are not made here."""
    # Counted once, not name by name: a file may have a column for each of 4096 features
    repeated = sorted(n for n, count in Counter(table.column_names).items() if count > 1)
    if repeated:
        raise InvalidInput(f"column '{shown(repeated[0])}' appears more than once")
    upload_limits.check_column_names(table.column_names, spec.feature_names)
    names = set(table.column_names)
    missing = [c for c in REQUIRED_COLUMNS if c not in names]
    if missing:
        raise InvalidInput(f"missing required column '{missing[0]}'")

    keys = col.strings(table["rollout"], "rollout", allow_null=False)
    upload_limits.check_names(table["rollout"], "rollout", slash=False)
    step = col.integers(table["step"], "step")
    upload_limits.check_steps(step)
    time_s = col.floats(table["time_s"], "time_s")
    upload_limits.check_times(time_s)
    features = _features(table, spec)
    control = _control(table, round_number)

    learner_action = _action(table, "learner_action", spec)
    expert_action = _action(table, "expert_action", spec)
    _require_expert_actions(expert_action, control, round_number)
    learner_probs = _probabilities(table, spec)
    learner_ensemble, ensemble_size = _ensemble(table, spec)
    learner_std = _std(table, spec)

    robot = None
    if "robot" in names:
        robot = col.strings(table["robot"], "robot", allow_null=True)
        upload_limits.check_names(table["robot"], "robot", slash=True)
    scene = (
        upload_limits.check_scenes(table["scene"], limits.max_scene_bytes)
        if "scene" in names
        else None
    )
    image = _optional_bytes(table, "image")
    if image is not None:
        upload_limits.check_images(image, limits.max_image_bytes)
    return RowColumns(
        keys=keys,
        step=step,
        time_s=time_s,
        control=control,
        features=features,
        learner_action=learner_action,
        expert_action=expert_action,
        learner_probs=learner_probs,
        learner_ensemble=learner_ensemble,
        ensemble_size=ensemble_size,
        learner_std=learner_std,
        robot=robot,
        scene=scene,
        image=image,
    )


def validate(
    table: pa.Table,
    spec: LoopSpec,
    *,
    round_number: int,
    limits: upload_limits.UploadLimits = DEFAULT_LIMITS,
) -> StepBatch:
    """Check a rollout table against the loop spec; return its arrays sorted by (rollout, step)."""
    rows = validate_rows(table, spec, round_number=round_number, limits=limits)
    rollout_keys, rollout_index = np.unique(rows.keys.astype(str), return_inverse=True)
    order = np.lexsort((rows.step, rollout_index))
    # Files usually arrive sorted: then a full slice takes views where the permutation would
    # copy every column (a quarter of a second at a million steps of 64 features).
    pick: np.ndarray | slice = slice(None) if _is_identity(order) else order
    check_order(rollout_index[pick], rows.step[pick], rows.time_s[pick], order, rollout_keys)
    return StepBatch(
        rollout_keys=[str(k) for k in rollout_keys],
        rollout_index=rollout_index[pick],
        row_number=order + 1,
        step=rows.step[pick],
        time_s=rows.time_s[pick],
        control=rows.control[pick],
        features=rows.features[pick],
        learner_action=_take(rows.learner_action, pick),
        expert_action=_take(rows.expert_action, pick),
        learner_probs=_take(rows.learner_probs, pick),
        learner_ensemble=_take(rows.learner_ensemble, pick),
        ensemble_size=rows.ensemble_size,
        learner_std=_take(rows.learner_std, pick),
        robot=_robot_per_rollout(rows.robot, rollout_index, len(rollout_keys)),
        scene=None if rows.scene is None else rows.scene[pick],
        image=None if rows.image is None else rows.image[pick],
    )


def _is_identity(order: np.ndarray) -> bool:
    return bool((order == np.arange(len(order))).all())


def _take(value: Any, order: np.ndarray | slice) -> Any:
    """Reorder an optional column; an all-missing column is the same as an absent one."""
    if value is None:
        return None
    if isinstance(value, col.Vectors):
        if not value.present.any():
            return None
        return col.Vectors(value.values[order], value.present[order])
    if (value == NO_ACTION).all():
        return None
    return value[order]


def _features(table: pa.Table, spec: LoopSpec) -> np.ndarray:
    width = len(spec.feature_names)
    names = set(table.column_names)
    per_feature = [f for f in spec.feature_names if f in names]
    if "features" in names:
        if per_feature:
            raise InvalidInput(
                f"give features either as the 'features' list column or one column per feature, "
                f"not both (found 'features' and '{per_feature[0]}')"
            )
        return col.float_vectors(table["features"], "features", width, allow_null=False).values
    if not per_feature:
        raise InvalidInput(
            "missing required column 'features' (or one column per feature: "
            f"{', '.join(spec.feature_names[:5])}{', ...' if width > 5 else ''})"
        )
    absent = [f for f in spec.feature_names if f not in names]
    if absent:
        raise InvalidInput(f"missing feature column '{absent[0]}'")
    out = np.empty((table.num_rows, width), dtype=np.float32)
    for j, name in enumerate(spec.feature_names):
        out[:, j] = col.floats32(table[name], name)
    return out


def _control(table: pa.Table, round_number: int) -> np.ndarray:
    default = CONTROL_EXPERT if round_number == 0 else CONTROL_LEARNER
    if "control" not in table.column_names:
        return np.full(table.num_rows, default, dtype=np.int8)
    values = col.strings(table["control"], "control", allow_null=True)
    control = np.full(table.num_rows, default, dtype=np.int8)
    control[values == "expert"] = CONTROL_EXPERT
    control[values == "learner"] = CONTROL_LEARNER
    known = np.isin(values, np.array([*CONTROL_VALUES, None], dtype=object))
    if not known.all():
        i = int(np.flatnonzero(~known)[0])
        raise col.fail(i, "control", f"'{shown(values[i])}' is not one of {list(CONTROL_VALUES)}")
    if round_number == 0 and (control != CONTROL_EXPERT).any():
        i = int(np.flatnonzero(control != CONTROL_EXPERT)[0])
        raise col.fail(i, "control", "round 0 holds demonstrations: every step is expert-driven")
    return control


def _action(table: pa.Table, name: str, spec: LoopSpec) -> np.ndarray | col.Vectors | None:
    if name not in table.column_names:
        return None
    column = table[name]
    if spec.kind == "continuous":
        vectors = col.float_vectors(column, name, spec.action_width, allow_null=True)
        # Actions are stored as float32: compare with the bounds in float32 too, so an action
        # exactly at a bound (0.2 becomes 0.2000000030 in float32) is not refused.
        low, high = spec.low.astype(np.float32), spec.high.astype(np.float32)
        outside = vectors.present[:, None] & ((vectors.values < low) | (vectors.values > high))
        if outside.any():
            i, j = (int(v[0]) for v in np.nonzero(outside))
            raise col.fail(
                i,
                name,
                f"{spec.action_names[j]} = {vectors.values[i, j]:g} is outside "
                f"[{spec.low[j]:g}, {spec.high[j]:g}] {spec.action_units[j]}".rstrip(),
            )
        return vectors
    if pa.types.is_null(column.type):
        return np.full(len(column), NO_ACTION, dtype=np.int32)
    nulls = col.null_mask(column)
    if pa.types.is_integer(column.type):
        raw = np.asarray(column.fill_null(NO_ACTION).to_numpy(), dtype=np.int64)
        bad = ~nulls & ((raw < 0) | (raw >= spec.action_width))
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise col.fail(i, name, f"action index {raw[i]} is not in 0..{spec.action_width - 1}")
        return np.where(nulls, NO_ACTION, raw).astype(np.int32)
    if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
        found = pc.index_in(column, value_set=pa.array(spec.action_names))
        unknown = col.null_mask(found) & ~nulls
        if unknown.any():
            i = int(np.flatnonzero(unknown)[0])
            raise col.fail(
                i,
                name,
                f"unknown action '{shown(column[i].as_py())}' "
                f"(known: {', '.join(spec.action_names)})",
            )
        return np.asarray(found.fill_null(NO_ACTION).to_numpy(), dtype=np.int32)
    raise InvalidInput(f"column {name}: expected action names or indexes, got {column.type}")


def _present(action: np.ndarray | col.Vectors | None, n: int) -> np.ndarray:
    if action is None:
        return np.zeros(n, dtype=bool)
    if isinstance(action, col.Vectors):
        return action.present
    return action != NO_ACTION


def _require_expert_actions(
    expert: np.ndarray | col.Vectors | None, control: np.ndarray, round_number: int
) -> None:
    has = _present(expert, len(control))
    needs = control == CONTROL_EXPERT
    lacking = needs & ~has
    if lacking.any():
        i = int(np.flatnonzero(lacking)[0])
        why = (
            "round 0 rows are demonstrations" if round_number == 0 else "the expert was in control"
        )
        raise col.fail(i, "expert_action", f"missing, but {why}")


def _probabilities(table: pa.Table, spec: LoopSpec) -> col.Vectors | None:
    if "learner_probs" not in table.column_names:
        return None
    if spec.kind != "discrete":
        raise InvalidInput("column learner_probs: only a discrete action space has probabilities")
    probs = col.float_vectors(
        table["learner_probs"], "learner_probs", spec.action_width, allow_null=True
    )
    _check_simplex(probs.values, probs.present, "learner_probs")
    return probs


def _check_simplex(values: np.ndarray, present: np.ndarray, name: str) -> None:
    """values (n, ..., K): every present row's last axis must be a probability distribution."""
    rows_negative = (values < 0).reshape(len(values), -1).any(axis=1) & present
    if rows_negative.any():
        raise col.fail(
            int(np.flatnonzero(rows_negative)[0]), name, "probabilities must not be negative"
        )
    sums = values.astype(np.float64).sum(axis=-1).reshape(len(values), -1)
    off = (np.abs(sums - 1.0) > PROBABILITY_SUM_TOLERANCE).any(axis=1) & present
    if off.any():
        i = int(np.flatnonzero(off)[0])
        worst = sums[i][np.argmax(np.abs(sums[i] - 1.0))]
        raise col.fail(
            i,
            name,
            f"probabilities sum to {worst:.6g}, not 1 (tolerance {PROBABILITY_SUM_TOLERANCE})",
        )


def _ensemble(table: pa.Table, spec: LoopSpec) -> tuple[col.Vectors | None, int]:
    if "learner_ensemble" not in table.column_names:
        return None, 0
    members, size = col.float_matrices(
        table["learner_ensemble"], "learner_ensemble", spec.action_width
    )
    if spec.kind == "discrete":
        _check_simplex(members.values, members.present, "learner_ensemble")
    return members, size


def _std(table: pa.Table, spec: LoopSpec) -> col.Vectors | None:
    if "learner_std" not in table.column_names:
        return None
    if spec.kind != "continuous":
        raise InvalidInput("column learner_std: only a continuous action space has a Gaussian std")
    std = col.float_vectors(table["learner_std"], "learner_std", spec.action_width, allow_null=True)
    negative = (std.values < 0).any(axis=1)
    if negative.any():
        raise col.fail(int(np.flatnonzero(negative)[0]), "learner_std", "must not be negative")
    return std


def check_order(
    rollout_index: np.ndarray,
    step: np.ndarray,
    time_s: np.ndarray,
    order: np.ndarray,
    keys: Sequence[str] | np.ndarray,
) -> None:
    """Sorted by (rollout, step): no step twice, and time increasing with step."""
    same_rollout = rollout_index[1:] == rollout_index[:-1]
    duplicate = same_rollout & (step[1:] == step[:-1])
    if duplicate.any():
        i = int(np.flatnonzero(duplicate)[0]) + 1
        raise repeated_step(int(order[i]), keys[rollout_index[i]], step[i])
    backwards = same_rollout & (time_s[1:] <= time_s[:-1])
    if backwards.any():
        i = int(np.flatnonzero(backwards)[0]) + 1
        raise time_not_after(
            int(order[i]), keys[rollout_index[i]], step[i], time_s[i], step[i - 1], time_s[i - 1]
        )


def repeated_step(row: int, key: str, step: Any) -> col.CellError:
    """The refusal of a step given twice in a rollout (`row`: the later one, 0-based)."""
    return col.fail(row, "step", f"rollout '{shown(key)}' has step {step} twice")


def time_not_after(
    row: int, key: str, step: Any, time_s: Any, prev_step: Any, prev_time_s: Any
) -> col.CellError:
    """The refusal of a step whose time is not after its predecessor's (`row`: 0-based)."""
    return col.fail(
        row,
        "time_s",
        f"rollout '{shown(key)}' step {step} has time {time_s:g} s, "
        f"not after step {prev_step} at {prev_time_s:g} s",
    )


def _optional_bytes(table: pa.Table, name: str) -> np.ndarray | None:
    if name not in table.column_names:
        return None
    column = table[name]
    if not (pa.types.is_binary(column.type) or pa.types.is_large_binary(column.type)):
        if pa.types.is_null(column.type):
            return None
        raise InvalidInput(f"column {name}: expected bytes, got {shown(str(column.type))}")
    return np.asarray(column.to_numpy(zero_copy_only=False), dtype=object)


def _robot_per_rollout(
    robot: np.ndarray | None, rollout_index: np.ndarray, n_rollouts: int
) -> list[str | None]:
    if robot is None:
        return [None] * n_rollouts
    out: list[str | None] = [None] * n_rollouts
    first_row = np.full(n_rollouts, -1)
    first_row[rollout_index[::-1]] = np.arange(len(rollout_index))[::-1]
    for r, i in enumerate(first_row):
        out[r] = robot[i]
    return out
