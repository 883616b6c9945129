"""Which labels count: an annotator's answer stands until their own later row supersedes it.

Labels are never changed or deleted. Undoing a label adds a row with answer "undone" that
supersedes it; changing one adds the new answer, superseding the old. Span labels fall with the
label they were copied from. Every reader of answers (claims, consensus, the training set, the
reports) goes through `is_current`, with a label-id cut-off where a version is pinned.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import ColumnElement, Select, and_, select
from sqlalchemy.orm import aliased

from ..queue.models import ANSWER_UNDONE, Label


def is_current(max_label_id: Any = None) -> ColumnElement[bool]:
    """WHERE clause on Label: an answer (not an undo row) that no label within the cut-off
    (id <= `max_label_id`; all labels when None) supersedes, directly or through its span
    anchor."""
    return and_(
        Label.answer != ANSWER_UNDONE,
        ~_superseding(Label.id, max_label_id).exists(),
        ~_superseding(Label.span_anchor_id, max_label_id).exists(),  # no anchor: no match
    )


def _superseding(label_id: Any, max_label_id: Any) -> Select[Any]:
    """The label that supersedes label `label_id`, if any: one naming it, and so made after it.

    Why this shape: a check asked of one label at a time (a submit's repeat check, a claim's
    candidate) must stay a probe of the unique index on supersedes_id as `labels` grows. Two
    probes on an equality each, not one on `supersedes_id = id OR supersedes_id =
    span_anchor_id`, which PostgreSQL costed above a scan of the whole table; and `id >` the
    label's, true of every superseding label, keeps PostgreSQL from answering the check by
    hashing every label once per statement (it hashes only a subquery tied to the outer row by
    equalities alone). A prepared statement keeps the plan chosen while the table was small
    until statistics are next gathered, and with either of those it read every label on each
    run (tests/queue/test_current_label_plans.py). Over many labels at once (a snapshot, a
    report) the planner still joins by hashing.
    """
    later = aliased(Label)
    query = select(later.id).where(later.supersedes_id == label_id, later.id > label_id)
    return query if max_label_id is None else query.where(later.id <= max_label_id)
