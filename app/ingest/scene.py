"""Checks on the static geometry a scene description may carry for the bench to draw.

`geometry` is an optional list of shapes in the robot's frame (metres, x forward, y left):
`{"kind": "line" | "polygon", "points": [[x, y], ...], "style": ..., "label": ...}`. Pure
functions; a refusal names the shape and the field.
"""

from __future__ import annotations

import math
from typing import Any

GEOMETRY_STYLES = {
    # style: what it is for (the bench's legend wording)
    "edge": "edge (aisle side, rack face, table edge)",
    "zone": "zone to watch (crossing, loading area)",
    "keepout": "keep-out area",
    "surface": "surface (table, dock plate)",
}
DEFAULT_STYLE = {"line": "edge", "polygon": "zone"}
MAX_SHAPES = 64
MAX_POINTS = 256
MAX_COORDINATE_M = 10_000.0
MAX_LABEL = 60


def geometry_problem(scene: dict[str, Any]) -> str | None:
    """What is wrong with a scene's `geometry` or `view_m`, in words naming the shape and field;
    None when fine."""
    if "view_m" in scene:
        view = scene["view_m"]
        if (
            isinstance(view, bool)
            or not isinstance(view, int | float)
            or not (math.isfinite(view) and 0 < view <= MAX_COORDINATE_M)
        ):
            return f"view_m must be a distance in metres above 0 and at most {MAX_COORDINATE_M:g}"
    if "geometry" not in scene:
        return None
    shapes = scene["geometry"]
    if not isinstance(shapes, list):
        return "geometry must be a list of shapes"
    if len(shapes) > MAX_SHAPES:
        return f"geometry has {len(shapes)} shapes; at most {MAX_SHAPES}"
    for n, shape in enumerate(shapes):
        where = f"geometry[{n}]"
        if not isinstance(shape, dict):
            return f"{where} must be an object with kind and points"
        unknown = sorted(set(shape) - {"kind", "points", "style", "label"})
        if unknown:
            return f"{where} has unknown fields {unknown} (kind, points, style, label)"
        kind = shape.get("kind")
        if kind not in DEFAULT_STYLE:
            return f"{where}.kind must be 'line' or 'polygon', got {kind!r}"
        problem = _points_problem(shape.get("points"), kind, where)
        if problem:
            return problem
        style = shape.get("style", DEFAULT_STYLE[kind])
        if style not in GEOMETRY_STYLES:
            return f"{where}.style must be one of {sorted(GEOMETRY_STYLES)}, got {style!r}"
        label = shape.get("label", "")
        if not isinstance(label, str) or len(label) > MAX_LABEL:
            return f"{where}.label must be text of at most {MAX_LABEL} characters"
    return None


def _points_problem(points: Any, kind: str, where: str) -> str | None:
    least = 2 if kind == "line" else 3
    if not isinstance(points, list) or not least <= len(points) <= MAX_POINTS:
        return f"{where}.points must be a list of {least} to {MAX_POINTS} [x, y] pairs for a {kind}"
    for k, point in enumerate(points):
        if (
            not isinstance(point, list)
            or len(point) != 2
            or any(isinstance(v, bool) or not isinstance(v, int | float) for v in point)
        ):
            return f"{where}.points[{k}] must be [x, y] in metres"
        if not all(math.isfinite(v) and abs(v) <= MAX_COORDINATE_M for v in point):
            return f"{where}.points[{k}] must be finite and within {MAX_COORDINATE_M:g} m"
    return None
