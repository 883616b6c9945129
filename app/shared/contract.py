"""The rollout file contract: one row per step, the same columns in every format.

The columns, their types and meaning are documented once, in the README's "Rollout files" table;
tests/docs/test_readme_tables.py keeps that table in step with the names below (a column that
is required there is in REQUIRED_COLUMNS, every other one in OPTIONAL_COLUMNS). Instead of the
`features` list column a file may carry one float column per loop feature, named as the feature.
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
