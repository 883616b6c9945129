"""What the loop page shows: display strings, charts and the data table beside each chart.

Pure presentation over computed reports (no store access); the template only lays it out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from markupsafe import Markup

from ..loops.models import Loop
from ..loops.spec import LoopSpec, spec_of
from ..sampler.tuning import SIGNALS
from . import charts
from .schemas import RateRead, RoundReport
from .table import loop_table

DASH = "–"


def number(value: float | None, digits: int = 3) -> str:
    """A value for people: ``digits`` significant digits, a dash where there is none."""
    if value is None:
        return DASH
    if math.isinf(value):
        return "∞" if value > 0 else "−∞"
    return f"{value:.{digits}g}"


def percent(value: float | None) -> str:
    """A fraction as a percentage with one decimal."""
    return DASH if value is None else f"{100 * value:.1f}%"


def rate_text(rate: RateRead) -> str:
    """A quoted rate as "12.5% (8.1–18.3%, n=40)", or why there is none."""
    if rate.rate is None:
        return f"too few labels ({rate.n})" if rate.n or rate.n_excluded else "no labels"
    low, high = 100 * (rate.lower or 0.0), 100 * (rate.upper or 0.0)
    return f"{percent(rate.rate)} ({low:.1f}–{high:.1f}%, n={rate.n})"


@dataclass
class Figure:
    """A chart and the table that carries the same numbers in text."""

    chart_id: str
    title: str
    caption: str
    svg: Markup
    headers: list[str]
    rows: list[list[str]] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)  # why some values are missing


def _point(rate: RateRead, x: int) -> charts.Point:
    if rate.rate is None:
        return charts.Point(x, None, note="too few" if rate.n else None)
    return charts.Point(x, rate.rate, rate.lower, rate.upper)


def _learner_rounds(reports: list[RoundReport]) -> list[RoundReport]:
    return [r for r in reports if r.round > 0]


def disagreement_figure(reports: list[RoundReport]) -> Figure:
    """Audit (unbiased) and ranked (biased) disagreement with 95% Wilson bars."""
    rounds = _learner_rounds(reports)
    series = [
        charts.Series("audit sample", [_point(r.audit.disagreement, r.round) for r in rounds]),
        charts.Series(
            "ranked sample (biased)",
            [_point(r.ranked.disagreement, r.round) for r in rounds],
            marker="square",
            hollow=True,
            dashed=True,
        ),
    ]
    title = "Learner-versus-expert disagreement by round"
    svg = charts.point_chart(
        series,
        chart_id="chart-disagreement",
        title=title,
        description="Share of states where the learner's action differs from the expert "
        "consensus, with 95% Wilson intervals; audit sample as filled circles, ranked sample "
        "(biased) as hollow squares on a dashed line. Rounds with too few labels show no point.",
        y_label="disagreement",
        y_floor=0.0,
        y_ceiling=1.0,
    )
    rows = [
        [str(r.round), rate_text(r.audit.disagreement), rate_text(r.ranked.disagreement)]
        for r in rounds
    ]
    headers = ["round", "audit sample", "ranked sample (biased)"]
    if reports and reports[0].action_kind == "continuous":
        headers.append("mean absolute error (audit)")
        for row, r in zip(rows, rounds, strict=True):
            mae = r.audit.disagreement.mean_absolute_error
            row.append("; ".join(number(v) for v in mae) if mae else DASH)
    return Figure(
        "chart-disagreement",
        title,
        "The audit sample is drawn uniformly at random and estimates the learner's on-policy "
        "disagreement; the ranked sample was chosen for being hard and overstates it.",
        Markup(svg),
        headers,
        rows,
    )


def change_figure(reports: list[RoundReport]) -> Figure:
    """Audit disagreement where the expert's action changes from the step before vs not."""
    rounds = _learner_rounds(reports)
    series = [
        charts.Series(
            "expert changes action",
            [_point(r.audit.changed, r.round) for r in rounds],
            marker="triangle",
        ),
        charts.Series(
            "expert keeps action",
            [_point(r.audit.unchanged, r.round) for r in rounds],
            marker="diamond",
            hollow=True,
            dashed=True,
        ),
    ]
    title = "Disagreement where the expert's action changes"
    svg = charts.point_chart(
        series,
        chart_id="chart-change",
        title=title,
        description="Audit-sample disagreement split by whether the expert's action differs "
        "from the learner's action one step earlier (filled triangles) or not (hollow "
        "diamonds, dashed), with 95% Wilson intervals.",
        y_label="disagreement",
        y_floor=0.0,
        y_ceiling=1.0,
    )
    rows = [
        [str(r.round), rate_text(r.audit.changed), rate_text(r.audit.unchanged)] for r in rounds
    ]
    return Figure(
        "chart-change",
        title,
        "A policy that repeats its previous action looks accurate overall and fails exactly "
        "where the expert changes action.",
        Markup(svg),
        ["round", "expert changes action", "expert keeps action"],
        rows,
    )


def shift_figure(reports: list[RoundReport]) -> Figure:
    """Unbiased MMD² between each round's visited states and the training set before it."""
    rounds = _learner_rounds(reports)
    points = [charts.Point(r.round, r.shift.mmd2) for r in rounds]
    title = "Shift from the training set by round"
    svg = charts.point_chart(
        [charts.Series("MMD² (unbiased)", points)],
        chart_id="chart-shift",
        title=title,
        description="Unbiased squared maximum mean discrepancy between each round's "
        "learner-visited states and the training set before it (standardised features, RBF "
        "kernel, median-heuristic bandwidth); larger means further from the training set.",
        y_label="MMD²",
    )
    rows = [
        [
            str(r.round),
            number(r.shift.mmd2),
            number(r.shift.p_value, 2),
            f"{r.shift.n_training_sample} of {r.shift.n_training}",
            f"{r.shift.n_round_sample} of {r.shift.n_round}",
            r.shift.features[0].name if r.shift.features else (r.shift.note or DASH),
        ]
        for r in rounds
    ]
    return Figure(
        "chart-shift",
        title,
        "p is a permutation p-value (smallest possible 1/(permutations + 1)).",
        Markup(svg),
        ["round", "MMD²", "p", "training states used", "round states used", "most shifted"],
        rows,
    )


def labels_figure(reports: list[RoundReport]) -> Figure:
    """Labels per round as bars, with pace."""
    any_labels = any(r.counts.labels for r in reports)  # all zero: say "no values yet"
    bars = [
        charts.Bar(
            f"round {r.round}", float(r.counts.labels) if any_labels else None, str(r.counts.labels)
        )
        for r in reports
    ]
    title = "Labels by round"
    svg = charts.bar_chart(
        bars,
        chart_id="chart-labels",
        title=title,
        description="Number of expert answers given in each round.",
        value_label="labels",
    )
    rows = [
        [
            str(r.round),
            str(r.counts.labels),
            str(r.counts.unsure_labels),
            str(r.counts.labelled_states),
            number(r.pace.labels_per_hour),
        ]
        for r in reports
    ]
    return Figure(
        "chart-labels",
        title,
        "Pace is labels per active person-hour; gaps over 15 minutes count as breaks.",
        Markup(svg),
        ["round", "labels", "unsure", "states labelled", "labels per hour"],
        rows,
    )


def agreement_figure(reports: list[RoundReport]) -> Figure:
    """Krippendorff's alpha (and Cohen's and Fleiss' kappa where they apply) across rounds."""
    rounds = _learner_rounds(reports)
    shapes: tuple[charts.Marker, ...] = ("circle", "square", "triangle", "diamond")
    dimensions = [a.dimension for a in rounds[0].agreement.krippendorff] if rounds else [None]
    if dimensions == [None]:
        series = [
            charts.Series(
                "Krippendorff's α",
                [charts.Point(r.round, r.agreement.krippendorff[0].alpha) for r in rounds],
            ),
            charts.Series(
                "Fleiss' κ",
                [charts.Point(r.round, r.agreement.fleiss_kappa) for r in rounds],
                marker="triangle",
                hollow=True,
                dashed=True,
            ),
            charts.Series(
                "Cohen's κ",
                [charts.Point(r.round, r.agreement.cohen_kappa) for r in rounds],
                marker="square",
                hollow=True,
            ),
        ]
    else:  # one interval alpha per action dimension (the table lists any beyond four)
        series = [
            charts.Series(
                f"α {name}",
                [charts.Point(r.round, r.agreement.krippendorff[i].alpha) for r in rounds],
                marker=shapes[i],
                hollow=i % 2 == 1,
                dashed=i % 2 == 1,
            )
            for i, name in enumerate(dimensions[: len(shapes)])
        ]
    title = "Annotator agreement by round"
    svg = charts.point_chart(
        series,
        chart_id="chart-agreement",
        title=title,
        description="Chance-corrected agreement among annotators on states with two or more "
        "votes; 1 is perfect agreement, 0 is chance level.",
        y_label="agreement",
        y_floor=0.0,
        y_ceiling=1.0,
    )
    rows = [
        [
            str(r.round),
            str(r.agreement.n_states),
            str(r.agreement.n_annotators),
            number(r.agreement.cohen_kappa),
            number(r.agreement.fleiss_kappa),
            "; ".join(
                (f"{a.dimension}: " if a.dimension else "") + number(a.alpha)
                for a in r.agreement.krippendorff
            ),
        ]
        for r in rounds
    ]
    # why a statistic is a dash (no state with two votes, or votes that never vary), under the
    # table at the figure's full width: a column of its own was squeezed to a letter a line
    by_note: dict[str, list[str]] = {}
    for r in rounds:
        if r.agreement.note:
            by_note.setdefault(r.agreement.note, []).append(str(r.round))
    notes = [
        f"{'Round' if len(numbers) == 1 else 'Rounds'} {', '.join(numbers)}: {note}."
        for note, numbers in by_note.items()
    ]
    return Figure(
        "chart-agreement",
        title,
        "Cohen's κ when exactly two annotators shared the states, Fleiss' κ when every state "
        "had the same number of votes, Krippendorff's α always (nominal for discrete actions, "
        "interval per dimension for continuous ones).",
        Markup(svg),
        ["round", "states", "annotators", "Cohen's κ", "Fleiss' κ", "Krippendorff's α"],
        rows,
        notes,
    )


def features_figure(report: RoundReport) -> Figure:
    """The most shifted features of one round as signed bars."""
    shift = report.shift
    bars = [charts.Bar(f.name, f.smd, number(f.smd)) for f in shift.features]
    title = f"Most shifted features in round {report.round}"
    svg = charts.bar_chart(
        bars,
        chart_id="chart-features",
        title=title,
        description="Standardised mean difference of each feature, round minus training set, "
        "in pooled standard deviations; bars to the right mean larger values in the round.",
        value_label="standardised mean difference",
    )
    rows = [
        [
            f.name,
            f.unit or DASH,
            number(f.mean_training),
            number(f.mean_round),
            number(f.smd) if f.note is None else f.note,
        ]
        for f in shift.features
    ]
    return Figure(
        "chart-features",
        title,
        "Standardised mean difference (Cohen's d): (round mean − training mean) / pooled "
        "standard deviation.",
        Markup(svg),
        ["feature", "unit", "training mean", "round mean", "SMD"],
        rows,
    )


def tolerance_text(spec: LoopSpec) -> str:
    """The per-dimension tolerance of a continuous loop, e.g. "speed_cmd ±0.2 m/s"."""
    return ", ".join(
        f"{name} ±{number(t)} {unit}".rstrip()
        for name, t, unit in zip(
            spec.action_names, spec.tolerance.tolist(), spec.action_units, strict=True
        )
    )


def loop_page_context(loop: Loop, reports: list[RoundReport]) -> dict[str, Any]:
    """Everything the loop page template needs, as display-ready values."""
    table = loop_table(loop, reports)
    spec = spec_of(loop)
    tolerance = None if spec.is_discrete else tolerance_text(spec)
    with_shift = [r for r in reports if r.shift.mmd2 is not None]
    latest = reports[-1] if reports else None
    rounds = [
        {
            "round": r.round,
            "learner_version": r.learner_version or DASH,
            "status": r.status,
            "states": r.counts.states,
            "selected": f"{r.counts.selected_audit} / {r.counts.selected_ranked}",
            "labels": r.counts.labels,
            "audit": _rate_cell(r.audit.disagreement, r.round),
            "audit_note": r.audit.disagreement.note,
            "ranked": _rate_cell(r.ranked.disagreement, r.round),
            "shift": number(r.shift.mmd2),
            "p_value": number(r.shift.p_value, 2),
            "alpha": number(row.krippendorff_alpha),
            "pace": number(r.pace.labels_per_hour),
            "shown_hidden": _shown_hidden_text(r),
        }
        for r, row in zip(reports, table.items, strict=True)
    ]
    return {
        "table": table,
        "tolerance": tolerance,
        "rounds": rounds,
        "figures": [
            disagreement_figure(reports),
            change_figure(reports),
            shift_figure(reports),
            labels_figure(reports),
            agreement_figure(reports),
        ],
        "features": features_figure(with_shift[-1]) if with_shift else None,
        "self_tuning": self_tuning_rows(reports),
        "latest": latest,
        "annotators": [
            [
                a.name,
                str(a.labels),
                percent(a.agreement),
                f"{a.compared}",
                number(a.labels_per_hour),
            ]
            for a in (latest.annotators if latest else [])
        ],
    }


def self_tuning_rows(reports: list[RoundReport]) -> list[list[str]]:
    """One row per ranked round: the disagreement model's weights and its audit calibration."""
    rows = []
    for r in reports:
        tuned = r.self_tuning
        if tuned is None:
            continue
        weights = tuned.weights or {}
        calibration = tuned.audit_calibration
        rows.append(
            [
                str(r.round),
                "predicted disagreement" if tuned.used else "weighted mean",
                number(tuned.intercept, 2),
                *(number(weights.get(name), 2) for name in SIGNALS),
                DASH
                if tuned.n_labelled is None
                else f"{tuned.n_disagreements} / {tuned.n_labelled}",
                DASH
                if calibration is None or not calibration.n
                else f"{calibration.expected:.1f} / {calibration.observed} (n = {calibration.n})",
                DASH if calibration is None else number(calibration.brier),
            ]
        )
    return rows


def _rate_cell(rate: RateRead, round_number: int) -> tuple[str, str]:
    """The rate, and its interval on a second line, for the rounds table."""
    if round_number == 0:
        return DASH, ""
    if rate.rate is None:
        return rate_text(rate), ""
    low, high = 100 * (rate.lower or 0.0), 100 * (rate.upper or 0.0)
    return percent(rate.rate), f"{low:.1f}–{high:.1f}%, n={rate.n}"


def _shown_hidden_text(report: RoundReport) -> tuple[str, str]:
    effect = report.shown_vs_hidden
    if effect.difference is None:
        return DASH, ""
    low, high = _signed(100 * (effect.lower or 0.0)), _signed(100 * (effect.upper or 0.0))
    return f"{_signed(100 * effect.difference)} pts", f"{low} to {high}"


def _signed(value: float) -> str:
    # a typographic minus, as in the rest of the page
    return f"{value:+.1f}".replace("-", "−")
