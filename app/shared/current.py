"""Which labels count: an annotator's answer stands until their own later row supersedes it.

Labels are never changed or deleted. Undoing a label adds a row with answer "undone" that
supersedes it; changing one adds the new answer, superseding the old. Span labels fall with the
label they were copied from. Every reader of answers (claims, consensus, the training set, the
reports) goes through `is_current`, with a label-id cut-off where a version is pinned.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import ColumnElement, and_, or_, select
from sqlalchemy.orm import aliased

from ..queue.models import ANSWER_UNDONE, Label


def is_current(max_label_id: Any = None) -> ColumnElement[bool]:
    """WHERE clause on Label: an answer (not an undo row) that no label within the cut-off
    (id <= `max_label_id`; all labels when None) supersedes, directly or through its span
    anchor."""
    later = aliased(Label)
    superseding = select(later.id).where(
        or_(
            later.supersedes_id == Label.id,
            and_(Label.span_anchor_id.is_not(None), later.supersedes_id == Label.span_anchor_id),
        )
    )
    if max_label_id is not None:
        superseding = superseding.where(later.id <= max_label_id)
    return and_(Label.answer != ANSWER_UNDONE, ~superseding.exists())
