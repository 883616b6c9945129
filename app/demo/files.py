"""Rollout files of the demo scenario (invented data) in the service's rollout file contract.

One row per step. Columns: rollout, step, time_s, features (list<float32>), control, learner
columns when a learner drove (learner_action, learner_probs for discrete, learner_ensemble),
expert_action (null where the learner was in control), robot, scene. Discrete actions are
written by name, continuous ones as list<float32>.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from numpy.typing import NDArray

from . import scenario as sc
from .sim import RolloutResult


def _list_array(values: NDArray[Any], valid: NDArray[np.bool_] | None = None) -> pa.Array:
    """A list<float32> column from (n, k) values, or list<list<float32>> from (n, m, k).

    ``valid`` (n,) bool marks the rows that hold a value; the others are null.
    """
    values = np.ascontiguousarray(values, dtype=np.float32)
    n, width = values.shape[0], values.shape[1]
    inner = values.reshape(n * width, *values.shape[2:])
    child = _list_array(inner) if values.ndim == 3 else pa.array(inner)
    offsets = pa.array(np.arange(n + 1, dtype=np.int32) * width)
    mask = None if valid is None else pa.array(~np.asarray(valid, dtype=bool))
    return pa.ListArray.from_arrays(offsets, child, mask=mask)


def _action_array(action: NDArray[Any], kind: str, valid: NDArray[np.bool_] | None) -> pa.Array:
    if kind == "discrete":
        names = np.asarray(sc.DISCRETE_ACTIONS, dtype=object)[np.asarray(action, dtype=np.int64)]
        mask = None if valid is None else ~np.asarray(valid, dtype=bool)
        return pa.array(names, type=pa.string(), mask=mask)
    return _list_array(action, valid)


def to_table(result: RolloutResult) -> pa.Table:
    """The rollout rows as a pyarrow Table in the service's rollout file contract."""
    cols = result.columns
    kind = result.kind
    by_expert = cols["control"] == "expert"
    arrays: dict[str, pa.Array] = {
        "rollout": pa.array(cols["rollout"], type=pa.string()),
        "step": pa.array(cols["step"], type=pa.int64()),
        "time_s": pa.array(cols["time_s"], type=pa.float64()),
        "features": _list_array(cols["features"]),
        "control": pa.array(cols["control"], type=pa.string()),
    }
    if "learner_action" in cols:
        arrays["learner_action"] = _action_array(cols["learner_action"], kind, None)
    if "learner_probs" in cols:
        arrays["learner_probs"] = _list_array(cols["learner_probs"])
    if "learner_ensemble" in cols:
        arrays["learner_ensemble"] = _list_array(cols["learner_ensemble"])
    # The expert's action on learner-controlled steps is what annotators are asked for: the
    # simulator knows it, the file must not carry it.
    arrays["expert_action"] = _action_array(cols["expert_action"], kind, by_expert)
    arrays["robot"] = pa.array(cols["robot"], type=pa.string())
    if "scene" in cols:
        arrays["scene"] = pa.array(cols["scene"], type=pa.string())
    metadata = {"expertloop.demo": sc.INVENTED_NOTE, "expertloop.action_kind": kind}
    return pa.Table.from_pydict(arrays).replace_schema_metadata(metadata)


def _float_leaf_paths(schema: pa.Schema) -> list[str]:
    """Parquet leaf paths of the float columns, including those inside (nested) lists."""
    paths = []
    for field in schema:
        path, kind = field.name, field.type
        while pa.types.is_list(kind):
            path, kind = path + ".list.element", kind.value_type
        if pa.types.is_floating(kind):
            paths.append(path)
    return paths


def write_parquet(table: pa.Table, path: str | Path) -> None:
    """Write ``table`` as Parquet, the service's main upload format.

    Floats are byte-stream split before zstd: it groups the bytes of equal significance, which
    compresses float32 features and probabilities by about a third more here.
    """
    strings = [f.name for f in table.schema if pa.types.is_string(f.type) and f.name != "scene"]
    pq.write_table(
        table,
        str(path),
        compression="zstd",
        compression_level=9,
        use_dictionary=strings,
        use_byte_stream_split=_float_leaf_paths(table.schema),
    )


def _shortest(value: Any) -> Any:
    """Floats as the shortest decimal that reads back as the same float32 (hand-readable)."""
    if isinstance(value, float):
        return float(str(np.float32(value)))
    if isinstance(value, list):
        return [_shortest(v) for v in value]
    return value


def jsonl_lines(table: pa.Table) -> list[str]:
    """One JSON object per row, keys as the table's columns; float32 lists in shortest form."""
    float32_columns = {field.name for field in table.schema if pa.types.is_list(field.type)}
    lines = []
    for row in table.to_pylist():
        clean = {k: (_shortest(v) if k in float32_columns else v) for k, v in row.items()}
        lines.append(json.dumps(clean, separators=(", ", ": ")))
    return lines


def write_jsonl(table: pa.Table, path: str | Path) -> None:
    """Write ``table`` as JSON Lines (for small hand-made files)."""
    Path(path).write_text("".join(line + "\n" for line in jsonl_lines(table)), encoding="utf-8")
