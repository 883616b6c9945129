"""The table across rounds: one flat row per round report, and its CSV text."""

from __future__ import annotations

import csv
import io

from ..loops.models import Loop
from ..loops.spec import spec_of
from . import rates
from .schemas import LoopReport, RoundReport, RoundReportRow


def report_row(report: RoundReport) -> RoundReportRow:
    """Flatten a round report into one row; withheld or undefined numbers stay ``None``.

    ``krippendorff_alpha`` is the nominal alpha for discrete actions and, for continuous
    ones, the lowest of the per-dimension interval alphas (the weakest dimension).
    """
    audit, ranked = report.audit.disagreement, report.ranked.disagreement
    alphas = [a.alpha for a in report.agreement.krippendorff if a.alpha is not None]
    features = report.shift.features
    return RoundReportRow(
        round=report.round,
        learner_version=report.learner_version,
        status=report.status,
        states=report.counts.states,
        learner_states=report.counts.learner_states,
        selected_audit=report.counts.selected_audit,
        selected_ranked=report.counts.selected_ranked,
        labels=report.counts.labels,
        labelled_states=report.counts.labelled_states,
        audit_n=audit.n,
        audit_disagreement=audit.rate,
        audit_lower=audit.lower,
        audit_upper=audit.upper,
        ranked_n=ranked.n,
        ranked_disagreement=ranked.rate,
        ranked_lower=ranked.lower,
        ranked_upper=ranked.upper,
        changed_n=report.audit.changed.n,
        changed_disagreement=report.audit.changed.rate,
        unchanged_n=report.audit.unchanged.n,
        unchanged_disagreement=report.audit.unchanged.rate,
        shift_mmd2=report.shift.mmd2,
        shift_p_value=report.shift.p_value,
        most_shifted_feature=features[0].name if features else None,
        cohen_kappa=report.agreement.cohen_kappa,
        fleiss_kappa=report.agreement.fleiss_kappa,
        krippendorff_alpha=min(alphas) if alphas else None,
        labels_per_hour=report.pace.labels_per_hour,
        shown_minus_hidden=report.shown_vs_hidden.difference,
    )


def loop_table(loop: Loop, reports: list[RoundReport]) -> LoopReport:
    """The table across rounds built from the rounds' reports."""
    rows = [report_row(r) for r in reports]
    return LoopReport(
        loop=loop.slug,
        title=loop.title,
        action_kind=spec_of(loop).kind,
        min_audit_labels=rates.MIN_AUDIT_LABELS,
        items=rows,
        total=len(rows),
    )


def rows_csv(rows: list[RoundReportRow]) -> str:
    """CSV text with a header of the row's field names; empty cells for ``None``.

    Floats are written with ``repr`` precision so the file round-trips to the JSON values.
    Text that a spreadsheet could run as a formula gets a leading apostrophe (docs/references.md,
    "Hostile input"): text starting with ``= + - @``, a tab or a carriage return, or with one of
    ``= + - @`` after leading white space.
    """
    sink = io.StringIO()
    names = list(RoundReportRow.model_fields)
    # RFC 4180 line ends: the writer then quotes any cell holding a carriage return or newline.
    writer = csv.writer(sink, lineterminator="\r\n")
    writer.writerow(names)
    for row in rows:
        values = row.model_dump()
        writer.writerow([_cell(values[n]) for n in names])
    return sink.getvalue()


FORMULA_LEADS = ("=", "+", "-", "@", "\t", "\r")


def _cell(value: object) -> object:
    if value is None:
        return ""
    if isinstance(value, str) and (
        value.startswith(FORMULA_LEADS) or value.lstrip().startswith(FORMULA_LEADS)
    ):
        return "'" + value
    return value
