"""The JSON Lines export's text (app/snapshots/export.py), checked against Python's json module.

The export writes its lines with orjson. The reference is the standard library's `json.dumps`
of each row built here from plain Python values (float32 cast to float64, as the module
docstring promises). Both are parsed by `json.loads` and compared value by value, floats bit for
bit, and numpy's float32 cast of every parsed number must give the stored bits back. Exports
through the server, on both backends: test_export.py.
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest

from expertloop.loops.spec import LoopSpec, parse_spec
from expertloop.shared.row_batches import SOURCES, RowBatch
from expertloop.snapshots import export
from expertloop.snapshots.export import jsonl_lines
from tests.helpers import CONTINUOUS_SPEC

# the columns in the order the module docstring documents
DOCUMENTED_COLUMNS = [
    "step_id",
    "features",
    "expert_action",
    "round",
    "source",
    "learner_version",
    "rollout",
    "step",
    "label_count",
    "agreement",
]
N_FEATURES = 7
F32 = np.finfo(np.float32)
# float32 values whose text differs between writers or is easy to get wrong
SPECIAL_F32 = np.array(
    [
        0.0,
        -0.0,
        F32.smallest_subnormal,  # 2**-149
        -F32.smallest_subnormal,
        np.uint32(0x00400001).view(np.float32),  # a subnormal with a long decimal
        np.uint32(0x007FFFFF).view(np.float32),  # the largest subnormal
        F32.tiny,  # the smallest normal
        1e-5,  # json.dumps: 1e-05
        1e-7,
        0.1,
        1 / 3,
        16777217.0,  # 2**24 + 1, stored as 2**24
        1e16,  # json.dumps: 1e+16
        -1e20,
        F32.max,
        -F32.max,
        123456.789,
    ],
    dtype=np.float32,
)
ROLLOUT_KEYS = {
    3: "plain-key",
    8: 'quote " backslash \\ tab-free',
    21: "café ünïcødé 日本 🤖",
}


def _spec(discrete: bool) -> LoopSpec:
    features = [{"name": f"f{i}", "unit": ""} for i in range(N_FEATURES)]
    if discrete:
        return parse_spec(features, {"kind": "discrete", "actions": ["a", "b", "c"]})
    return parse_spec(features, CONTINUOUS_SPEC["action_space"])


def _finite_f32(rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    """Every float32 bit pattern equally likely (any exponent, subnormals too), finite only."""
    bits = rng.integers(0, 2**32, size=shape, dtype=np.uint64).astype(np.uint32)
    values = bits.view(np.float32)
    return np.where(np.isfinite(values), values, np.float32(1.5))


def _batch(spec: LoopSpec, n: int = 40, seed: int = 0) -> RowBatch:
    rng = np.random.default_rng(seed)
    features = _finite_f32(rng, (n, N_FEATURES))
    features.reshape(-1)[: len(SPECIAL_F32)] = SPECIAL_F32
    if spec.is_discrete:
        action = rng.integers(0, spec.action_width, n).astype(np.int64)
    else:
        action = _finite_f32(rng, (n, spec.action_width))
        action.reshape(-1)[-len(SPECIAL_F32) :] = SPECIAL_F32
    return RowBatch(
        step_id=np.sort(rng.choice(2**40, n, replace=False)).astype(np.int64),
        source=rng.integers(0, len(SOURCES), n).astype(np.int8),
        action=action,
        label_count=rng.integers(1, 6, n).astype(np.int64),
        agreement=np.concatenate([[1.0, 0.5, 1 / 3, 2 / 3], rng.random(n - 4)]),
        round=rng.integers(0, 3, n).astype(np.int64),
        rollout_id=rng.choice(list(ROLLOUT_KEYS), n).astype(np.int64),
        step_index=rng.integers(0, 10**6, n).astype(np.int64),
        features=features,
        rollout_keys=dict(ROLLOUT_KEYS),
        learner_versions={0: None, 1: "policy-1", 2: "pölicy 2"},
    )


def _reference_lines(batch: RowBatch, discrete: bool) -> list[str]:
    """Each row as the standard library writes it, from plain Python values."""
    assert batch.features is not None
    lines = []
    for i in range(len(batch)):
        action = (
            int(batch.action[i])
            if discrete
            else [float(v) for v in batch.action[i].astype(np.float64)]
        )
        values = [
            int(batch.step_id[i]),
            [float(v) for v in batch.features[i].astype(np.float64)],
            action,
            int(batch.round[i]),
            SOURCES[int(batch.source[i])],
            batch.learner_versions[int(batch.round[i])],
            batch.rollout_keys[int(batch.rollout_id[i])],
            int(batch.step_index[i]),
            int(batch.label_count[i]),
            float(batch.agreement[i]),
        ]
        lines.append(json.dumps(dict(zip(DOCUMENTED_COLUMNS, values, strict=True))))
    return lines


def _same(got: Any, want: Any) -> bool:
    """Equal values of equal types; floats bit for bit (so -0.0 is not 0.0)."""
    if type(got) is not type(want):
        return False
    if isinstance(want, float):
        return math.copysign(1.0, got) == math.copysign(1.0, want) and got == want
    if isinstance(want, list):
        return len(got) == len(want) and all(_same(g, w) for g, w in zip(got, want, strict=True))
    if isinstance(want, dict):
        return list(got) == list(want) and all(_same(got[k], want[k]) for k in want)
    return bool(got == want)


@pytest.mark.parametrize("discrete", [True, False], ids=["discrete", "continuous"])
def test_lines_parse_to_the_values_json_dumps_writes(discrete):
    spec = _spec(discrete)
    batch = _batch(spec)
    content = jsonl_lines(batch, spec)
    assert content.endswith(b"\n")
    lines = content.decode("utf-8").split("\n")[:-1]
    # stored names hold no line separators, so readers that split on any of them agree
    assert content.decode("utf-8").splitlines() == lines
    want = [json.loads(line) for line in _reference_lines(batch, discrete)]
    got = [json.loads(line) for line in lines]
    assert len(got) == len(batch)
    assert [list(row) for row in got] == [DOCUMENTED_COLUMNS] * len(batch)
    for row_got, row_want in zip(got, want, strict=True):
        assert _same(row_got, row_want), (row_got, row_want)
    # the texts differ (spacing, exponents, UTF-8): the check above compared values, not text
    assert lines != _reference_lines(batch, discrete)


@pytest.mark.parametrize("discrete", [True, False], ids=["discrete", "continuous"])
def test_float32_cast_of_each_number_gives_the_stored_bits_back(discrete):
    spec = _spec(discrete)
    batch = _batch(spec, seed=1)
    assert batch.features is not None
    rows = [json.loads(line) for line in jsonl_lines(batch, spec).splitlines()]
    features = np.array([row["features"] for row in rows], dtype=np.float64).astype(np.float32)
    np.testing.assert_array_equal(features.view(np.uint32), batch.features.view(np.uint32))
    if not discrete:
        actions = np.array([row["expert_action"] for row in rows], dtype=np.float64)
        np.testing.assert_array_equal(
            actions.astype(np.float32).view(np.uint32), batch.action.view(np.uint32)
        )
    agreement = np.array([row["agreement"] for row in rows], dtype=np.float64)
    np.testing.assert_array_equal(agreement.view(np.uint64), batch.agreement.view(np.uint64))


def test_chunks_are_the_lines_of_every_batch_in_order(monkeypatch):
    """Batches of 11, 0 and 19 rows, written 4 lines at a time."""
    monkeypatch.setattr(export, "JSONL_ROWS", 4)
    spec = _spec(discrete=True)
    whole = _batch(spec, n=30, seed=2)
    parts = [whole.take(slice(0, 11)), whole.take(slice(11, 11)), whole.take(slice(11, 30))]
    chunks = list(export.jsonl_chunks(parts, spec))
    assert [c.count(b"\n") for c in chunks] == [4, 4, 3, 4, 4, 4, 4, 3]
    want = [json.loads(line) for line in _reference_lines(whole, discrete=True)]
    got = [json.loads(line) for line in b"".join(chunks).splitlines()]
    assert len(got) == 30
    assert all(_same(g, w) for g, w in zip(got, want, strict=True))


@pytest.mark.parametrize(
    "column, value",
    [("features", np.nan), ("features", -np.inf), ("agreement", np.nan), ("action", np.inf)],
)
def test_a_number_json_cannot_write_stops_the_export(column, value):
    """json.dumps would write NaN or Infinity (not JSON) and orjson null; the store holds
    neither (ingest and answers refuse them), so a row holding one is refused, not written."""
    spec = _spec(discrete=False)
    batch = _batch(spec, n=12, seed=3)
    values = getattr(batch, column)
    values.reshape(len(batch), -1)[5, 0] = value
    with pytest.raises(ValueError, match=f"step {batch.step_id[5]} holds a number JSON cannot"):
        jsonl_lines(batch, spec)
