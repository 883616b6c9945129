"""The demo run's plot: closed-loop conflicts and audit disagreement across rounds, as one SVG."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Protocol

from ..reports.charts import Point, Series, point_chart


class _Row(Protocol):
    round: int
    audit_disagreement: float | None
    audit_lower: float | None
    audit_upper: float | None
    audit_quoted: bool
    conflicts_per_100: float


def write_plot(rows: Sequence[_Row], path: Path, *, title: str) -> None:
    """Write two charts stacked in one SVG file."""
    conflicts = point_chart(
        [Series("learner", [Point(r.round, r.conflicts_per_100) for r in rows])],
        chart_id="conflicts",
        title=f"{title}: conflicts per 100 crossings (closed loop)",
        description="Conflicts per 100 crossings of the learner after each round.",
        y_label="conflicts / 100 crossings",
        y_floor=0.0,
    )
    audit = point_chart(
        [
            Series(
                "audit disagreement",
                [
                    Point(
                        r.round,
                        r.audit_disagreement,
                        r.audit_lower,
                        r.audit_upper,
                        note=None if r.audit_quoted else "few labels",
                    )
                    for r in rows
                    if r.round > 0
                ],
                marker="square",
            )
        ],
        chart_id="audit",
        title=f"{title}: learner-vs-expert disagreement on the audit sample (95% Wilson)",
        description="Share of audited states where the learner's action differs from the expert's.",
        y_label="disagreement",
        y_floor=0.0,
        y_ceiling=1.0,
    )
    height = 560
    path.write_text(
        f'<svg xmlns="http://www.w3.org/2000/svg" width="560" height="{height}">'
        f'<g>{conflicts}</g><g transform="translate(0, 280)">{audit}</g></svg>\n'
    )
