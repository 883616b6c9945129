"""The rollout file contract: one row per step, the same columns in every format.

| column             | type                                   | required | meaning |
|--------------------|----------------------------------------|----------|---------|
| rollout            | string                                 | yes      | rollout key, unique within the loop |
| step               | integer >= 0                           | yes      | step index, unique within the rollout |
| time_s             | float                                  | yes      | seconds since the rollout began, increasing with step |
| features           | list of float, length = loop features  | one of   | the state vector in the loop's feature order |
| <feature name>     | float, one column per loop feature     | these    | alternative to `features` |
| control            | "learner" or "expert"                  | no       | who drove; default "learner" (round 0: "expert") |
| learner_action     | action name or index / list of float   | no       | what the learner did |
| learner_probs      | list of float, length = actions        | no       | learner's action probabilities (discrete) |
| learner_ensemble   | list of lists: members x actions/dims  | no       | each ensemble member's probabilities or action |
| learner_std        | list of float, length = dimensions     | no       | Gaussian policy standard deviations (continuous) |
| expert_action      | action name or index / list of float   | where control is expert | the expert's action |
| robot              | string                                 | no       | which robot ran the rollout |
| scene              | JSON text (object in JSON Lines)       | no       | agents around the robot, for the bench to draw |
| image              | bytes (base64 text in JSON Lines)      | no       | camera image (PNG or JPEG) |
"""

from __future__ import annotations

REQUIRED_COLUMNS = ("rollout", "step", "time_s")
OPTIONAL_COLUMNS = (
    "features",
    "control",
    "learner_action",
    "learner_probs",
    "learner_ensemble",
    "learner_std",
    "expert_action",
    "robot",
    "scene",
    "image",
)
CONTROL_VALUES = ("learner", "expert")
PROBABILITY_SUM_TOLERANCE = 1e-3
FORMATS = ("parquet", "npz", "jsonl")
