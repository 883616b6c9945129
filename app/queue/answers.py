"""Checks on an answer before anything is stored: the action against the loop's action space,
the submission id, the span and the time spent. Pure functions; refusals name the field."""

from __future__ import annotations

import math
import re
from typing import Any

import numpy as np

from ..errors import InvalidInput
from ..loops.schemas import LoopSettings
from ..loops.spec import LoopSpec
from ..shared.encode import FLOAT32_LE, FLOAT32_MAX
from .models import ANSWER_ACTION, ANSWER_UNSURE, Label
from .schemas import SUBMISSION_ID_PATTERN

# Room is left in the 64-character column for the ".N" suffix of span labels.
SUBMISSION_ID = re.compile(SUBMISSION_ID_PATTERN)
MAX_SECONDS_SPENT = 86_400.0


def check_answer(spec: LoopSpec, *, answer: str, action: Any) -> tuple[int | None, bytes | None]:
    """Validate an answer against the action space; returns (discrete index, continuous bytes).

    Raises InvalidInput naming the field: an index out of range, a vector of the wrong length,
    a value that is not finite or lies outside its dimension's bounds.
    """
    if answer == ANSWER_UNSURE:
        if action is not None:
            raise InvalidInput("action: leave it empty when the answer is unsure")
        return None, None
    if answer != ANSWER_ACTION:
        raise InvalidInput(f"answer: expected 'action' or 'unsure', got {answer!r}")
    if action is None:
        raise InvalidInput("action: required when the answer is an action")
    if spec.is_discrete:
        names = ", ".join(f"{i} {n}" for i, n in enumerate(spec.action_names))
        if isinstance(action, bool) or not isinstance(action, int):
            raise InvalidInput(f"action: a discrete action is an index ({names}); got {action!r}")
        if not 0 <= action < len(spec.action_names):
            raise InvalidInput(f"action: index {action} is out of range ({names})")
        return action, None
    if not isinstance(action, list | tuple) or any(
        isinstance(v, bool) or not isinstance(v, int | float) for v in action
    ):
        raise InvalidInput(f"action: a continuous action is a list of numbers; got {action!r}")
    if len(action) != spec.action_width:
        raise InvalidInput(
            f"action: expected {spec.action_width} values ({', '.join(spec.action_names)}), "
            f"got {len(action)}"
        )
    values = np.asarray(action, dtype=np.float64)
    for i, value in enumerate(values.tolist()):
        name, unit = spec.action_names[i], spec.action_units[i]
        if not math.isfinite(value):
            raise InvalidInput(f"action[{i}] ({name}): must be a finite number")
        if abs(value) > FLOAT32_MAX:  # within the bounds of a loop stored with wider ones
            raise InvalidInput(
                f"action[{i}] ({name}): {value:g} is beyond float32's range "
                f"(±{FLOAT32_MAX:.7g}), in which actions are stored"
            )
        if not spec.low[i] <= value <= spec.high[i]:
            raise InvalidInput(
                f"action[{i}] ({name}): {value:g} is outside its bounds "
                f"{spec.low[i]:g} to {spec.high[i]:g} {unit}".rstrip()
            )
    return None, values.astype(FLOAT32_LE).tobytes()


def stored_action(label: Label) -> int | list[float] | None:
    """A label's action as the API shows it: an index, a vector, or None (unsure)."""
    if label.action_vec is not None:
        return np.frombuffer(label.action_vec, dtype=FLOAT32_LE).tolist()
    return label.action


def check_request(
    settings: LoopSettings,
    *,
    submission_id: str,
    answer: str,
    span_steps: int,
    seconds_spent: float | None,
) -> None:
    """Check the parts of a submit other than the action: its id, span and time spent."""
    if not isinstance(submission_id, str) or not SUBMISSION_ID.match(submission_id):
        raise InvalidInput("submission_id: 8 to 48 letters, digits, '-' or '_' (one per answer)")
    if span_steps < 0:
        raise InvalidInput("span_steps: must be 0 or more")
    if span_steps > 0:
        if not settings.span_labels:
            raise InvalidInput("span_steps: span labels are off for this loop (span_labels)")
        if answer != ANSWER_ACTION:
            raise InvalidInput("span_steps: only an action can be applied to earlier steps")
        if span_steps > settings.span_max_steps:
            raise InvalidInput(
                f"span_steps: at most {settings.span_max_steps} (span_max_steps), got {span_steps}"
            )
    if seconds_spent is not None and not (
        math.isfinite(seconds_spent) and 0 <= seconds_spent <= MAX_SECONDS_SPENT
    ):
        raise InvalidInput(f"seconds_spent: between 0 and {MAX_SECONDS_SPENT:g}")
