"""API shapes of an annotator's recent labels and of their undo and change."""

from __future__ import annotations

from datetime import datetime
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from ..queue.schemas import SUBMISSION_ID_SCHEMA, BenchStep


class MyLabel(BaseModel):
    """One of the caller's standing answers, with the state it answers and what may be done."""

    id: int
    item_id: int
    state: BenchStep
    answer: str
    action: int | list[float] | None
    action_name: str | None
    created_at: datetime
    replaces: int | None = Field(description="the label this answer changed, if it is a change")
    in_snapshot: str | None = Field(description="the first version holding this answer, if any")
    can_undo: bool = Field(description="no version holds it yet; once one does, change it")


class MyLabelList(BaseModel):
    items: list[MyLabel]
    total: int


class UndoCreate(BaseModel):
    model_config = ConfigDict(extra="forbid")

    submission_id: str = Field(max_length=64, json_schema_extra=SUBMISSION_ID_SCHEMA)


class UndoRead(BaseModel):
    label_id: int
    item_id: int
    repeated: bool


class ChangeCreate(BaseModel):
    """A new answer for a state the caller labelled; it supersedes their earlier one."""

    model_config = ConfigDict(extra="forbid")

    submission_id: str = Field(max_length=64, json_schema_extra=SUBMISSION_ID_SCHEMA)
    answer: Literal["action", "unsure"]
    action: int | list[float] | None = None


class ChangeRead(BaseModel):
    label: MyLabel
    correction: bool = Field(
        description="the replaced answer was already in a version: the new one supersedes it "
        "from the next version on, and the report counts it as a correction"
    )
    repeated: bool
