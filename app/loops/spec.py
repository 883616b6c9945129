"""A loop's spec as every stage reads it: parsed and validated once from the JSON on its row.

The row stores the spec as JSON (`Loop.features`, `Loop.action_space`, `Loop.settings`,
`Loop.log_mapping`); this module is the one place that turns it into types: the pydantic models
of `schemas.py` and `log_mapping.py` for the parts, plus what the stages derive from them (action
width, bounds, tolerances). Settings a stored loop predates take their defaults here, so no caller
reads a raw key or a `.get` default.
"""

from __future__ import annotations

import threading
import weakref
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray
from pydantic import TypeAdapter

from .log_mapping import LogMapping
from .models import Loop
from .schemas import (
    ActionSpace,
    ContinuousActionSpace,
    DiscreteActionSpace,
    FeatureSpec,
    LoopSettings,
)

DEFAULT_TOLERANCE_FRACTION = 0.1
"""Default tolerance of a continuous disagreement, as a fraction of each dimension's range."""

_FEATURES = TypeAdapter(list[FeatureSpec])
_ACTION_SPACE: TypeAdapter[DiscreteActionSpace | ContinuousActionSpace] = TypeAdapter(ActionSpace)


def _frozen(values: Sequence[float] | NDArray[np.float64]) -> NDArray[np.float64]:
    # shared by every request that reads the cached spec: nobody may change it in place
    out = np.array(values, dtype=np.float64)
    out.flags.writeable = False
    return out


@dataclass(frozen=True, eq=False)
class LoopSpec:
    """One loop's features, action space, settings and log mapping (None: files only), with what
    every stage derives from them.

    low, high : ndarray of shape (action_width,), the continuous bounds; empty when discrete
    tolerance : ndarray of shape (action_width,), how far a continuous action may lie from the
        expert's and still agree (the setting, else 10% of each range); empty when discrete
    The arrays are read-only: one spec is shared by everyone who reads the same row.
    """

    features: tuple[FeatureSpec, ...]
    action_space: DiscreteActionSpace | ContinuousActionSpace
    settings: LoopSettings
    log_mapping: LogMapping | None
    low: NDArray[np.float64]
    high: NDArray[np.float64]
    tolerance: NDArray[np.float64]

    @property
    def kind(self) -> Literal["discrete", "continuous"]:
        return self.action_space.kind

    @property
    def is_discrete(self) -> bool:
        return isinstance(self.action_space, DiscreteActionSpace)

    @property
    def feature_names(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.features)

    @property
    def feature_units(self) -> tuple[str, ...]:
        return tuple(f.unit for f in self.features)

    @property
    def n_features(self) -> int:
        return len(self.features)

    @property
    def action_names(self) -> tuple[str, ...]:
        """The discrete actions, or the continuous dimensions, in vector order."""
        space = self.action_space
        if isinstance(space, DiscreteActionSpace):
            return tuple(space.actions)
        return tuple(d.name for d in space.dimensions)

    @property
    def action_units(self) -> tuple[str, ...]:
        """Unit of each continuous dimension; empty when discrete."""
        space = self.action_space
        if isinstance(space, DiscreteActionSpace):
            return ()
        return tuple(d.unit for d in space.dimensions)

    @property
    def action_width(self) -> int:
        """Actions (discrete) or dimensions (continuous): the width of probabilities and vectors."""
        space = self.action_space
        if isinstance(space, DiscreteActionSpace):
            return len(space.actions)
        return len(space.dimensions)

    def action_name(self, action: Any) -> str | None:
        """The name of a discrete action index; None for a vector, or no action."""
        if not self.is_discrete or not isinstance(action, int) or isinstance(action, bool):
            return None
        return self.action_names[action]


def parse_spec(
    features: Sequence[Mapping[str, Any]],
    action_space: Mapping[str, Any],
    settings: Mapping[str, Any] | None = None,
    log_mapping: Mapping[str, Any] | None = None,
) -> LoopSpec:
    """The typed spec of stored (or sent) JSON; missing settings take their defaults.

    Raises pydantic's ValidationError when a part is not a valid spec part.
    """
    parsed_features = tuple(_FEATURES.validate_python(list(features)))
    space = _ACTION_SPACE.validate_python(dict(action_space))
    typed_settings = LoopSettings.model_validate(dict(settings or {}))
    mapping = None if not log_mapping else LogMapping.model_validate(dict(log_mapping))
    if isinstance(space, DiscreteActionSpace):
        low = high = tolerance = _frozen([])
    else:
        low = _frozen([d.low for d in space.dimensions])
        high = _frozen([d.high for d in space.dimensions])
        chosen = typed_settings.continuous_tolerance
        tolerance = _frozen(chosen if chosen else (high - low) * DEFAULT_TOLERANCE_FRACTION)
    return LoopSpec(parsed_features, space, typed_settings, mapping, low, high, tolerance)


# One parse per row object: a request, job or report reads the spec many times. A cached spec is
# used only while the row still holds the very JSON values it was parsed from (kept here, so
# their identity cannot pass to new values).
_CACHE: weakref.WeakKeyDictionary[Loop, tuple[tuple[Any, ...], LoopSpec]] = (
    weakref.WeakKeyDictionary()
)
_CACHE_LOCK = threading.Lock()


def spec_of(loop: Loop) -> LoopSpec:
    """The typed spec of a stored loop, parsed once per row object."""
    parts = (loop.features, loop.action_space, loop.settings, loop.log_mapping)
    with _CACHE_LOCK:
        hit = _CACHE.get(loop)
    if hit is not None and all(a is b for a, b in zip(hit[0], parts, strict=True)):
        return hit[1]
    spec = parse_spec(*parts)
    with _CACHE_LOCK:
        _CACHE[loop] = (parts, spec)
    return spec
