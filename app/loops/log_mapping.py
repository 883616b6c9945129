"""The log mapping: how a loop's states are read from robot logs (ROS bags).

It is part of the loop spec (`log_mapping`), validated here on its own and against the loop's
features and action space by `check_against_loop`. The README's "Robot logs" section documents
every field with a worked example.
"""

from __future__ import annotations

import re
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from ..limits import PlainText

TOPIC_PATTERN = r"^/?[A-Za-z0-9_~{}][A-Za-z0-9_/~{}]{0,254}$"
# name(.name)* with [index] after any name: twist.twist.linear.x, velocity[3], poses[0].pose
FIELD_PATH_PATTERN = (
    r"^[A-Za-z_][A-Za-z0-9_]*(\[[0-9]{1,6}\])*(\.[A-Za-z_][A-Za-z0-9_]*(\[[0-9]{1,6}\])*)*$"
)
CONTROL_NAMES = ("learner", "expert")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class FieldSource(_Strict):
    """One value read from each message of a topic: the topic and a field path into the message."""

    topic: str = Field(pattern=TOPIC_PATTERN)
    field: str = Field(pattern=FIELD_PATH_PATTERN, max_length=300)

    def describe(self) -> str:
        return f"topic {self.topic}, field {self.field}"


class FeatureSource(FieldSource):
    """A feature's source; `unit` (if given) must be the loop feature's unit; value x `scale`."""

    unit: str | None = Field(default=None, max_length=32)
    scale: float = 1.0


class DiscreteActionSource(FieldSource):
    """A discrete action: an integer index or an action name, or a raw value looked up in
    `values` (keys are the raw values as text, e.g. "0", "GO")."""

    values: dict[str, str] | None = None


class ContinuousActionSource(_Strict):
    """A continuous action: one source per dimension of the loop's action space, by name."""

    dimensions: dict[str, FieldSource] = Field(min_length=1, max_length=16)


class VectorSource(FieldSource):
    """A list of numbers in one field (probabilities, standard deviations, ensemble outputs).

    For an ensemble the list is member-major: `members` blocks of one value per action or
    dimension.
    """

    members: int | None = Field(default=None, ge=2, le=64)


class ControlSource(FieldSource):
    """Who is in control, from a mode topic: raw value as text -> "learner" or "expert"."""

    values: dict[str, Literal["learner", "expert"]] = Field(min_length=1)


class ImageSource(_Strict):
    """Camera frames (sensor_msgs Image or CompressedImage); each step takes the nearest frame
    in time, none when the nearest is further away than `max_age_s`."""

    topic: str = Field(pattern=TOPIC_PATTERN)
    max_age_s: float = Field(default=0.5, gt=0, le=3600)


class SceneSource(_Strict):
    """The scene for the bench: a JSON string (std_msgs String) or our own Scene message."""

    topic: str = Field(pattern=TOPIC_PATTERN)
    format: Literal["json", "message"] = "json"
    max_age_s: float = Field(default=1.0, gt=0, le=3600)


class _Part(_Strict):
    """The robot's name as a part of a longer text: split at `separator`, take part `part`
    (from 0; -1 is the last). Without a separator, the whole text."""

    separator: str | None = Field(default=None, min_length=1, max_length=8)
    part: int = Field(default=0, ge=-16, le=15)

    def pick(self, text: str) -> str:
        """The part of `text` that names the robot; ValueError where there is none."""
        if self.separator is None:
            name = text
        else:
            parts = text.split(self.separator)
            if not -len(parts) <= self.part < len(parts):
                raise ValueError(
                    f"'{text}' has {len(parts)} parts split at '{self.separator}', no part "
                    f"{self.part}"
                )
            name = parts[self.part]
        if not name.strip():
            raise ValueError(f"'{text}' gives an empty robot name")
        return name

    def rule(self) -> str:
        if self.separator is None:
            return ""
        return f", part {self.part} split at '{self.separator}'"


class RobotFromValue(_Strict):
    """One robot for every log of the loop, named here."""

    source: Literal["value"]
    value: PlainText = Field(min_length=1, max_length=200)

    def describe(self) -> str:
        return f"the mapping's robot '{self.value}'"


class RobotFromFileName(_Part):
    """The robot's name from the uploaded file's name (without its folder and log suffix)."""

    source: Literal["file_name"]

    def describe(self) -> str:
        return f"the file name{self.rule()}"


class RobotFromTopic(_Part, FieldSource):
    """The robot's name from a text or number field of a topic (an id topic, a frame id): at
    each rollout's first step the newest message's value (before any, the first message's)."""

    source: Literal["topic"]

    def describe(self) -> str:
        return f"{super().describe()}{self.rule()}"


RobotSource = Annotated[
    RobotFromValue | RobotFromFileName | RobotFromTopic, Field(discriminator="source")
]


class TopicRule(_Strict):
    """How a topic's values are brought onto the step grid."""

    resample: Literal["hold", "linear"] = "hold"
    max_age_s: float | None = Field(default=None, gt=0, le=3600)
    stamp: Literal["auto", "header", "log"] = "auto"


class RolloutSplit(_Strict):
    """How a bag becomes rollouts: the whole bag, or segments between mode changes and gaps."""

    split: Literal["bag", "segments"] = "bag"
    on_mode_change: bool = True
    gap_s: float | None = Field(default=None, gt=0, le=86_400)
    min_steps: int = Field(default=1, ge=1, le=1_000_000)


class LogMapping(_Strict):
    """How a loop's states are read from a robot log."""

    step_rate_hz: float = Field(gt=0, le=1000)
    max_age_s: float = Field(default=0.5, gt=0, le=3600)
    on_missing: Literal["drop", "refuse"] = "drop"
    topics: dict[str, TopicRule] = Field(default_factory=dict)
    features: dict[str, FeatureSource] = Field(min_length=1, max_length=4096)
    learner_action: DiscreteActionSource | ContinuousActionSource | None = None
    expert_action: DiscreteActionSource | ContinuousActionSource | None = None
    learner_probs: VectorSource | None = None
    learner_ensemble: VectorSource | None = None
    learner_std: VectorSource | None = None
    control: ControlSource | None = None
    image: ImageSource | None = None
    scene: SceneSource | None = None
    robot: RobotSource | None = None
    rollouts: RolloutSplit = Field(default_factory=RolloutSplit)

    @field_validator("topics")
    @classmethod
    def _topic_names(cls, topics: dict[str, TopicRule]) -> dict[str, TopicRule]:
        bad = [t for t in topics if not re.match(TOPIC_PATTERN, t)]
        if bad:
            raise ValueError(f"'{bad[0]}' is not a topic name")
        return topics

    @model_validator(mode="after")
    def _consistent(self) -> LogMapping:
        if self.learner_ensemble is not None and self.learner_ensemble.members is None:
            raise ValueError("learner_ensemble: give `members` (how many ensemble members)")
        if self.rollouts.split == "segments" and not (
            (self.rollouts.on_mode_change and self.control) or self.rollouts.gap_s
        ):
            raise ValueError(
                "rollouts: split 'segments' needs a control topic with on_mode_change, or gap_s"
            )
        unused = sorted(set(self.topics) - self.read_topics())
        if unused:
            raise ValueError(f"topics: '{unused[0]}' is not read by any source of the mapping")
        return self

    def value_sources(self) -> dict[str, FieldSource]:
        """Every numeric or text source by a name of its own (feature:NAME, learner_action, ...)."""
        out: dict[str, FieldSource] = {f"feature:{k}": v for k, v in self.features.items()}
        for name in ("learner_action", "expert_action"):
            action = getattr(self, name)
            if isinstance(action, ContinuousActionSource):
                out |= {f"{name}:{d}": s for d, s in action.dimensions.items()}
            elif action is not None:
                out[name] = action
        for name in ("learner_probs", "learner_ensemble", "learner_std", "control"):
            if getattr(self, name) is not None:
                out[name] = getattr(self, name)
        if isinstance(self.robot, RobotFromTopic):
            out["robot"] = self.robot
        return out

    def read_topics(self) -> set[str]:
        """Every topic the mapping reads."""
        topics = {s.topic for s in self.value_sources().values()}
        return topics | {s.topic for s in (self.image, self.scene) if s is not None}

    def rule(self, topic: str) -> TopicRule:
        """The topic's resampling rule, with the mapping's max age where the topic sets none."""
        rule = self.topics.get(topic, TopicRule())
        if rule.max_age_s is None:
            rule = rule.model_copy(update={"max_age_s": self.max_age_s})
        return rule


def check_against_loop(
    mapping: LogMapping, features: list[dict[str, Any]], action_space: dict[str, Any]
) -> None:
    """Refuse (ValueError) a mapping that does not fit the loop's features and action space."""
    names = [f["name"] for f in features]
    missing = [n for n in names if n not in mapping.features]
    if missing:
        raise ValueError(f"log_mapping.features: no source for loop feature '{missing[0]}'")
    extra = [n for n in mapping.features if n not in names]
    if extra:
        raise ValueError(f"log_mapping.features: '{extra[0]}' is not a feature of the loop")
    units = {f["name"]: f.get("unit", "") for f in features}
    for name, source in mapping.features.items():
        if source.unit is not None and source.unit != units[name]:
            raise ValueError(
                f"log_mapping.features.{name}: unit '{source.unit}' is not the loop's "
                f"'{units[name]}' (convert with `scale`, then state the loop's unit)"
            )
    discrete = action_space["kind"] == "discrete"
    for name in ("learner_action", "expert_action"):
        _check_action(name, getattr(mapping, name), action_space)
    if mapping.learner_probs is not None and not discrete:
        raise ValueError(
            "log_mapping.learner_probs: only a discrete action space has probabilities"
        )
    if mapping.learner_std is not None and discrete:
        raise ValueError("log_mapping.learner_std: only a continuous action space has a std")


def _check_action(
    name: str, source: DiscreteActionSource | ContinuousActionSource | None, space: dict[str, Any]
) -> None:
    if source is None:
        return
    if space["kind"] == "discrete":
        if not isinstance(source, DiscreteActionSource):
            raise ValueError(f"log_mapping.{name}: a discrete loop takes one topic and field")
        unknown = sorted(set((source.values or {}).values()) - set(space["actions"]))
        if unknown:
            raise ValueError(f"log_mapping.{name}.values: '{unknown[0]}' is not an action")
        return
    if not isinstance(source, ContinuousActionSource):
        raise ValueError(f"log_mapping.{name}: a continuous loop takes `dimensions`")
    dims = [d["name"] for d in space["dimensions"]]
    if sorted(source.dimensions) != sorted(dims):
        raise ValueError(
            f"log_mapping.{name}.dimensions: give exactly the loop's dimensions {dims}"
        )
