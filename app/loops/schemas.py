"""API shapes of loops and rounds, and the validation of a loop spec."""

from __future__ import annotations

from typing import Annotated, Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from ..limits import PlainText, RequestBody, UtcDatetime
from ..shared.contract import OPTIONAL_COLUMNS, REQUIRED_COLUMNS
from ..shared.encode import FLOAT32_MAX
from .log_mapping import LogMapping, check_against_loop

NAME_PATTERN = r"^[a-z][a-z0-9_]{0,62}$"
SLUG_PATTERN = r"^[a-z0-9][a-z0-9-]{1,62}$"

# A feature may not shadow a column name of the rollout file contract.
RESERVED_COLUMN_NAMES = frozenset((*REQUIRED_COLUMNS, *OPTIONAL_COLUMNS))
DEFAULT_MIN_GAP_STEPS = 10
"""Ten steps (1 s at 10 Hz) removed the budget shortfall in an earlier run through the API;
bench/label_efficiency.py --gap-steps compares others (README, "Label efficiency")."""


class FeatureSpec(RequestBody):
    name: str = Field(pattern=NAME_PATTERN)
    unit: PlainText = Field(default="", max_length=32)


class DiscreteActionSpace(RequestBody):
    kind: Literal["discrete"]
    actions: list[Annotated[str, Field(pattern=NAME_PATTERN)]] = Field(min_length=2, max_length=32)

    @field_validator("actions")
    @classmethod
    def _unique(cls, actions: list[str]) -> list[str]:
        if len(set(actions)) != len(actions):
            raise ValueError("action names must be unique")
        return actions


class ContinuousDimension(RequestBody):
    name: str = Field(pattern=NAME_PATTERN)
    low: float
    high: float
    unit: PlainText = Field(default="", max_length=32)

    @model_validator(mode="after")
    def _ordered(self) -> ContinuousDimension:
        if not self.low < self.high:
            raise ValueError(f"dimension {self.name}: low ({self.low}) must be below high")
        return self


class ContinuousActionSpace(RequestBody):
    kind: Literal["continuous"]
    dimensions: list[ContinuousDimension] = Field(min_length=1, max_length=16)

    @field_validator("dimensions")
    @classmethod
    def _unique(cls, dims: list[ContinuousDimension]) -> list[ContinuousDimension]:
        if len({d.name for d in dims}) != len(dims):
            raise ValueError("dimension names must be unique")
        return dims


ActionSpace = Annotated[DiscreteActionSpace | ContinuousActionSpace, Field(discriminator="kind")]


class LoopSettings(RequestBody):
    """Per-loop settings; every default here is documented in the README."""

    labels_per_state: int = Field(default=1, ge=1, le=10)
    lease_seconds: int = Field(default=300, ge=10, le=86_400)
    show_learner_fraction: float = Field(default=0.0, ge=0.0, le=1.0)
    span_labels: bool = False
    span_max_steps: int = Field(default=10, ge=1, le=100)
    context_seconds: float = Field(default=5.0, gt=0, le=120)
    uncertainty_weight: float = Field(default=0.5, ge=0.0)
    novelty_weight: float = Field(default=0.5, ge=0.0)
    novelty_k: int = Field(default=10, ge=1, le=100)
    min_gap_steps: int = Field(
        default=DEFAULT_MIN_GAP_STEPS,
        ge=0,
        le=100_000,
        description="Minimum distance between two ranked picks from one rollout, in the "
        "rollout's recorded steps; relaxed step by step when it would leave the budget unspent.",
    )
    audit_fraction: float = Field(default=0.1, ge=0.0, le=1.0)
    spread: bool = False
    stratify: bool = Field(
        default=True,
        description="Share the ranked picks among k-means cells of the round's states in "
        "proportion to each cell's total score, best-scored first within a cell.",
    )
    takeover_window_s: float = Field(default=3.0, ge=0.0)
    takeover_boost: float = Field(default=0.25, ge=0.0, le=1.0)
    uncertainty_method: Literal["auto", "entropy", "margin", "least_confidence"] = Field(
        default="auto",
        description="auto: BALD for an ensemble, entropy for probabilities; the others score "
        "the probabilities (an ensemble's mean) by that rule. Discrete action spaces only.",
    )
    self_tuning: bool = Field(
        default=True,
        description="Rank by a model of disagreement fitted on earlier rounds' labels once "
        "they hold enough disagreements.",
    )
    tuning_min_disagreements: int = Field(default=10, ge=1, le=100_000)
    key_features: list[str] | None = Field(
        default=None,
        max_length=64,
        description="Features the bench shows first, in this order (names from the state schema).",
    )
    continuous_start: Literal["neutral", "previous", "learner"] = Field(
        default="neutral",
        description="Where a continuous answer starts on the bench: neutral (0 where the bounds "
        "allow, else mid-range), previous (the step before's expert command, else your own "
        "answer on an earlier step of the rollout), learner (the learner's action on items that "
        "show it).",
    )
    context_commands: Literal["none", "expert", "all"] = Field(
        default="expert",
        description="Commands plotted for the steps before a state: none, the expert's on "
        "takeover steps, or all (the learner's too).",
    )
    continuous_tolerance: list[float] | None = Field(
        default=None,
        description="Per-dimension tolerance for counting a continuous disagreement; "
        "default 10% of each dimension's range.",
    )

    @model_validator(mode="before")
    @classmethod
    def _renamed(cls, data: Any) -> Any:
        if isinstance(data, dict) and "min_gap_s" in data:
            raise ValueError(
                "min_gap_s was replaced by min_gap_steps (recorded steps): "
                "min_gap_steps = round(min_gap_s * f) at f Hz"
            )
        return data

    @model_validator(mode="after")
    def _weights(self) -> LoopSettings:
        if self.uncertainty_weight + self.novelty_weight <= 0:
            raise ValueError("uncertainty_weight + novelty_weight must be positive")
        return self


class LoopCreate(RequestBody):
    """A loop spec: what the CLI reads from a file and the API takes as JSON."""

    slug: str = Field(pattern=SLUG_PATTERN)
    title: PlainText = Field(min_length=1, max_length=200)
    features: list[FeatureSpec] = Field(min_length=1, max_length=4096)
    action_space: ActionSpace
    settings: LoopSettings = Field(default_factory=LoopSettings)
    log_mapping: LogMapping | None = None

    @field_validator("features")
    @classmethod
    def _feature_names(cls, features: list[FeatureSpec]) -> list[FeatureSpec]:
        names = [f.name for f in features]
        if len(set(names)) != len(names):
            raise ValueError("feature names must be unique")
        clash = sorted(set(names) & RESERVED_COLUMN_NAMES)
        if clash:
            raise ValueError(f"feature names {clash} are column names of the rollout file")
        return features

    @field_validator("action_space")
    @classmethod
    def _bounds_in_float32(cls, space: ActionSpace) -> ActionSpace:
        """Actions are stored as float32: a bound beyond its range let an answer within the
        bounds be stored as infinity (and every snapshot and report of the loop fail), and
        bounds equal as float32 leave the dimension no range. Checked when a loop is created,
        so that loops stored before still read."""
        for d in getattr(space, "dimensions", ()):
            for bound in (d.low, d.high):
                if abs(bound) > FLOAT32_MAX:
                    raise ValueError(
                        f"dimension {d.name}: bound {bound:g} is beyond float32's range "
                        f"(±{FLOAT32_MAX:.7g}), in which actions are stored"
                    )
            if not np.float32(d.low) < np.float32(d.high):
                raise ValueError(
                    f"dimension {d.name}: low ({d.low}) and high ({d.high}) are the same as "
                    "float32, in which actions are stored"
                )
        return space

    @model_validator(mode="after")
    def _uncertainty_method(self) -> LoopCreate:
        method = self.settings.uncertainty_method
        if method != "auto" and not isinstance(self.action_space, DiscreteActionSpace):
            raise ValueError(
                f"settings.uncertainty_method {method!r} scores action probabilities: it needs "
                "a discrete action space (use 'auto' for a continuous one)"
            )
        return self

    @model_validator(mode="after")
    def _key_features_known(self) -> LoopCreate:
        names = {f.name for f in self.features}
        unknown = [n for n in self.settings.key_features or [] if n not in names]
        if unknown:
            raise ValueError(f"settings.key_features: {unknown} are not features of this loop")
        return self

    @model_validator(mode="after")
    def _tolerance_width(self) -> LoopCreate:
        tol = self.settings.continuous_tolerance
        if tol is not None:
            if not isinstance(self.action_space, ContinuousActionSpace):
                raise ValueError("settings.continuous_tolerance needs a continuous action space")
            if len(tol) != len(self.action_space.dimensions) or min(tol) <= 0:
                raise ValueError("settings.continuous_tolerance: one positive value per dimension")
        if self.log_mapping is not None:
            check_against_loop(
                self.log_mapping,
                [f.model_dump() for f in self.features],
                self.action_space.model_dump(),
            )
        return self


class LoopRead(BaseModel):
    model_config = ConfigDict(from_attributes=True)

    slug: str
    title: str
    features: list[FeatureSpec]
    action_space: ActionSpace
    settings: LoopSettings
    log_mapping: LogMapping | None = None
    created_at: UtcDatetime


class LoopList(BaseModel):
    items: list[LoopRead]
    total: int


class RoundOpen(RequestBody):
    learner_version: PlainText = Field(min_length=1, max_length=200)


class RoundRead(BaseModel):
    number: int
    learner_version: str | None
    status: str
    opened_at: UtcDatetime
    closed_at: UtcDatetime | None
    rollouts: int
    steps: int


class RoundList(BaseModel):
    items: list[RoundRead]
    total: int
