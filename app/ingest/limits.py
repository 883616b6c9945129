"""Limits on what a rollout file may hold, checked before anything reaches the store, so that the
same file gets the same answer on SQLite and PostgreSQL. Every refusal names the row and column.

| what | limit |
|---|---|
| column names | the contract's columns and the loop's feature names only |
| rollout key | 1-200 characters, NFC, no control or bidi-control characters, no '/' |
| robot | 1-200 characters, NFC, no control or bidi-control characters |
| step | 0 to 2**31 - 1 (the store's INTEGER column) |
| time_s | 0 or more, finite |
| integer features | at most 2**24 in magnitude (float32 holds those exactly) |
| float features and learner outputs | within float32's range (a larger finite value would be stored as infinity) |
| scene | a JSON object of at most `max_scene_bytes`: `frame`, up to 256 `agents` (`kind`, `x`, `y`, `heading`), up to 64 `geometry` shapes and `view_m` (app.ingest.scene) |
| image | PNG, JPEG or WebP by their first bytes, at most `max_image_bytes` |
"""

from __future__ import annotations

import difflib
import json
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from ..errors import InvalidInput
from ..limits import INT32_MAX, KEY_MAX_CHARS, name_problem, shown
from ..shared.contract import OPTIONAL_COLUMNS, REQUIRED_COLUMNS
from . import columns as col
from .images import HEAD_BYTES, image_media_type
from .scene import geometry_problem

STEP_MAX = INT32_MAX
SCENE_MAX_AGENTS = 256
SCENE_TEXT_MAX_CHARS = 32


@dataclass(frozen=True)
class UploadLimits:
    """The per-upload limits that come from settings (defaults as documented in the README)."""

    max_image_bytes: int = 4 * 1024 * 1024
    max_scene_bytes: int = 64 * 1024
    max_array_bytes: int = 1024 * 1024 * 1024


def check_column_names(names: Sequence[str], feature_names: Sequence[str]) -> None:
    """Refuse a column the contract does not know, suggesting the nearest known name."""
    known = [*REQUIRED_COLUMNS, *OPTIONAL_COLUMNS, *feature_names]
    known_set = set(known)
    for name in names:
        if name in known_set:
            continue
        lowered = {k.lower(): k for k in known}
        nearest = difflib.get_close_matches(name.lower(), list(lowered), n=1, cutoff=0.6)
        hint = f"; did you mean {lowered[nearest[0]]}?" if nearest else ""
        raise InvalidInput(f"unknown column '{shown(name)}'{hint} (columns are case-sensitive)")


def check_names(column: pa.ChunkedArray, name: str, *, slash: bool) -> None:
    """Rollout keys or robot names (a text column, nulls skipped) within the name rules."""
    if not (pa.types.is_string(column.type) or pa.types.is_large_string(column.type)):
        return  # the column's type is refused with its own message
    for value in column.unique().drop_null().to_pylist():
        problem = name_problem(value, max_chars=KEY_MAX_CHARS, slash=slash)
        if problem:
            row = pc.index(column, value).as_py()
            raise col.fail(int(row), name, f"'{shown(value)}' {problem}")


def check_steps(step: np.ndarray) -> None:
    """Steps within 0 .. STEP_MAX."""
    if (step < 0).any():
        raise col.fail(int(np.flatnonzero(step < 0)[0]), "step", "must be 0 or more")
    if (step > STEP_MAX).any():
        i = int(np.flatnonzero(step > STEP_MAX)[0])
        raise col.fail(i, "step", f"{step[i]} is beyond the largest step, {STEP_MAX}")


def check_times(time_s: np.ndarray) -> None:
    """Times are seconds since the rollout began: never negative."""
    if (time_s < 0).any():
        i = int(np.flatnonzero(time_s < 0)[0])
        raise col.fail(i, "time_s", f"{time_s[i]:g} s is negative; time counts from 0")


class SceneAgent(BaseModel):
    """One agent of a scene description, as the bench draws it."""

    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False)

    kind: str | None = Field(default=None, max_length=SCENE_TEXT_MAX_CHARS)
    x: float
    y: float
    heading: float | None = None


class Scene(BaseModel):
    """A scene description: the agents around the robot, in its frame."""

    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False)

    frame: str | None = Field(default=None, max_length=SCENE_TEXT_MAX_CHARS)
    agents: list[SceneAgent] = Field(default_factory=list, max_length=SCENE_MAX_AGENTS)
    # static shapes and the view's reach, checked in plain words by app.ingest.scene
    geometry: list[Any] | None = None
    view_m: float | None = None


def check_scenes(column: pa.ChunkedArray, max_bytes: int) -> np.ndarray:
    """Scene descriptions (JSON text, None where absent) within the size limit and the shape."""
    scenes = col.strings(column, "scene", allow_null=True)
    if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
        sizes = pc.fill_null(pc.binary_length(column), 0).to_numpy(zero_copy_only=False)
        over = sizes > max_bytes
        if over.any():
            i = int(np.flatnonzero(over)[0])
            raise col.fail(i, "scene", f"{sizes[i]} bytes; at most {max_bytes} are accepted")
    for i, text in enumerate(scenes):
        if text is None:
            continue
        try:
            parsed = json.loads(text)
        except (json.JSONDecodeError, RecursionError) as exc:
            why = exc.msg if isinstance(exc, json.JSONDecodeError) else "nested too deeply"
            raise col.fail(i, "scene", f"not valid JSON ({why})") from exc
        if not isinstance(parsed, dict):
            raise col.fail(i, "scene", "must be a JSON object")
        problem = geometry_problem(parsed)
        if problem:
            raise col.fail(i, "scene", problem)
        try:
            Scene.model_validate(parsed)
        except ValidationError as exc:
            first = exc.errors()[0]
            where = ".".join(str(p) for p in first["loc"])
            raise col.fail(i, "scene", f"{where}: {shown(first['msg'])}") from exc
    return scenes


def check_images(images: np.ndarray, max_bytes: int) -> None:
    """Images (bytes, None where absent): PNG, JPEG or WebP, within the size limit."""
    for i, image in enumerate(images):
        if image is None:
            continue
        if len(image) > max_bytes:
            raise col.fail(i, "image", f"{len(image)} bytes; at most {max_bytes} are accepted")
        if image_media_type(image[:HEAD_BYTES]) is None:
            raise col.fail(i, "image", "not a PNG, JPEG or WebP image (checked by its first bytes)")
