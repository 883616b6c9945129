"""Small SVG charts drawn by the server: points with interval bars across rounds, and bars.

Pure functions returning SVG text; every piece of text passed in is escaped here, so callers
may mark the result safe. Each chart is an image to assistive technology (``role="img"``,
``aria-label``, ``<title>`` and ``<desc>``); the page puts a data table beside it. Series are
told apart by marker shape, fill and line style as well as colour, and named in a legend.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from html import escape
from typing import Literal

Marker = Literal["circle", "square", "triangle", "diamond"]

INK = "#1d2a3a"
GRID = "#e4ddd0"
PAPER = "#fbf8f2"
PALETTE = ("#0f5c8c", "#a8551c", "#2d6a4f", "#6b3fa0")
"""Series colours (ink blue, ochre, pine, plum); shapes carry the meaning as well."""
FONT = 'font-family="system-ui, sans-serif"'


@dataclass(frozen=True)
class Point:
    """One value at one x (a round number); ``y`` None draws nothing but the ``note``."""

    x: float
    y: float | None
    lower: float | None = None
    upper: float | None = None
    note: str | None = None


@dataclass(frozen=True)
class Series:
    """A named run of points with its marker; ``hollow`` and ``dashed`` mark a second kind."""

    name: str
    points: Sequence[Point]
    marker: Marker = "circle"
    hollow: bool = False
    dashed: bool = False


@dataclass(frozen=True)
class Bar:
    """One bar: a label, a signed value (None: not available) and the text shown beside it."""

    label: str
    value: float | None
    text: str | None = None


def nice_ticks(low: float, high: float, count: int = 5) -> list[float]:
    """Round tick values covering [low, high]: steps of 1, 2, 2.5 or 5 times a power of ten."""
    if not (math.isfinite(low) and math.isfinite(high)):
        raise ValueError("tick range must be finite")
    if high <= low:
        high = low + (abs(low) if low else 1.0)
    raw = (high - low) / max(count - 1, 1)
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1.0, 2.0, 2.5, 5.0, 10.0) if m * power >= raw * 0.999)
    first = math.floor(low / step + 1e-9) * step
    last = math.ceil(high / step - 1e-9) * step
    n = int(round((last - first) / step))
    return [round(first + i * step, 12) for i in range(n + 1)]


def _tick_text(value: float, ticks: Sequence[float]) -> str:
    # the fewest decimals that write every tick exactly (0.25 needs two, 0.5 one)
    for decimals in range(7):
        if all(abs(round(t, decimals) - t) < 1e-9 for t in ticks):
            return f"{value:.{decimals}f}"
    return f"{value:.3g}"


def _marker(shape: Marker, x: float, y: float, colour: str, hollow: bool, size: float = 1.0) -> str:
    paint = f'fill="{PAPER if hollow else colour}" stroke="{colour}" stroke-width="1.8"'
    r = 4.5 * size
    if shape == "circle":
        return f'<circle cx="{x:.1f}" cy="{y:.1f}" r="{r:.1f}" {paint}/>'
    if shape == "square":
        side = 2 * r - 1
        return f'<rect x="{x - side / 2:.1f}" y="{y - side / 2:.1f}" width="{side:.1f}" ' + (
            f'height="{side:.1f}" {paint}/>'
        )
    if shape == "triangle":
        corners = [(x, y - 1.2 * r), (x + 1.1 * r, y + 0.8 * r), (x - 1.1 * r, y + 0.8 * r)]
    else:  # diamond
        corners = [(x, y - 1.2 * r), (x + 1.2 * r, y), (x, y + 1.2 * r), (x - 1.2 * r, y)]
    points = " ".join(f"{a:.1f},{b:.1f}" for a, b in corners)
    return f'<polygon points="{points}" {paint}/>'


def _open(chart_id: str, title: str, description: str, width: int, height: int) -> list[str]:
    ident = escape(chart_id)
    return [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="chart" viewBox="0 0 {width} {height}" '
        f'width="{width}" height="{height}" role="img" aria-label="{escape(title)}" '
        f'aria-describedby="{ident}-desc" {FONT} font-size="12">',
        f'<title id="{ident}-title">{escape(title)}</title>',
        f'<desc id="{ident}-desc">{escape(description)}</desc>',
        f'<rect x="0.5" y="0.5" width="{width - 1}" height="{height - 1}" fill="#fff" '
        f'stroke="{GRID}"/>',
    ]


def point_chart(
    series: Sequence[Series],
    *,
    chart_id: str,
    title: str,
    description: str,
    y_label: str,
    x_label: str = "round",
    y_floor: float | None = None,
    y_ceiling: float | None = None,
    width: int = 560,
    height: int = 260,
) -> str:
    """Points (with interval bars where given) across rounds, one marker shape per series.

    Parameters
    ----------
    series : sequence of Series
        At most four; points of different series at one x are drawn side by side.
    y_floor, y_ceiling : float, optional
        Fixed ends of the value axis (e.g. 0 and 1 for a rate); otherwise from the data.
    """
    if len(series) > len(PALETTE):
        raise ValueError(f"at most {len(PALETTE)} series per chart")
    # series with notes (values withheld) get a row each under the round numbers, where the
    # note sits beside the series' own marker, so it never collides with the plotted lines
    noted = [i for i, s in enumerate(series) if any(p.y is None and p.note for p in s.points)]
    left, right, top, bottom = 58, 14, 34, 40 + 13 * len(noted)
    plot_w, plot_h = width - left - right, height - top - bottom
    parts = _open(chart_id, title, description, width, height)
    lx = float(left)
    for i, s in enumerate(series):  # legend across the top: marker, line style and name
        if i:  # room for the previous name, about 0.6 em per character at 12 px
            lx += 46 + 7.0 * len(series[i - 1].name)
        colour = PALETTE[i]
        dash = ' stroke-dasharray="5 3"' if s.dashed else ""
        parts.append(
            f'<line x1="{lx:.1f}" y1="16" x2="{lx + 22:.1f}" y2="16" stroke="{colour}" '
            f'stroke-width="1.5"{dash}/>'
        )
        parts.append(_marker(s.marker, lx + 11, 16, colour, s.hollow))
        parts.append(f'<text x="{lx + 28:.1f}" y="20" fill="{INK}">{escape(s.name)}</text>')
    xs = sorted({p.x for s in series for p in s.points})
    values = [v for s in series for p in s.points for v in (p.y, p.lower, p.upper) if v is not None]
    values = [v for v in values if math.isfinite(v)]
    if not values:
        parts.append(
            f'<text x="{width / 2:.0f}" y="{height / 2:.0f}" text-anchor="middle" '
            f'fill="{INK}">no values yet</text></svg>'
        )
        return "".join(parts)
    low = y_floor if y_floor is not None else min(values)
    high = y_ceiling if y_ceiling is not None else max(values)
    ticks = nice_ticks(min(low, min(values)), max(high, max(values)))
    y0, y1 = ticks[0], ticks[-1]

    def ypos(v: float) -> float:
        return top + plot_h * (1.0 - (v - y0) / (y1 - y0))

    def xpos(x: float) -> float:
        if len(xs) == 1:
            return left + plot_w / 2
        return left + 12 + (plot_w - 24) * (x - xs[0]) / (xs[-1] - xs[0])

    for t in ticks:
        y = ypos(t)
        parts.append(
            f'<line x1="{left}" y1="{y:.1f}" x2="{width - right}" y2="{y:.1f}" stroke="{GRID}"/>'
        )
        parts.append(
            f'<text x="{left - 6}" y="{y + 4:.1f}" text-anchor="end" fill="{INK}">'
            f"{_tick_text(t, ticks)}</text>"
        )
    label_every = max(1, math.ceil(len(xs) / 12))
    for j, x in enumerate(xs):
        if j % label_every == 0:
            parts.append(
                f'<text x="{xpos(x):.1f}" y="{top + plot_h + 16}" text-anchor="middle" '
                f'fill="{INK}">{escape(_number_text(x))}</text>'
            )
    parts.append(
        f'<line x1="{left}" y1="{top + plot_h}" x2="{width - right}" y2="{top + plot_h}" '
        f'stroke="{INK}"/>'
    )
    parts.append(
        f'<text x="{left + plot_w / 2:.0f}" y="{height - 6}" text-anchor="middle" '
        f'fill="{INK}">{escape(x_label)}</text>'
    )
    parts.append(
        f'<text transform="translate(14 {top + plot_h / 2:.0f}) rotate(-90)" '
        f'text-anchor="middle" fill="{INK}">{escape(y_label)}</text>'
    )
    # notes need about 60 px between rounds; with more rounds the table beside says it
    room_for_notes = len(xs) < 2 or (plot_w - 24) / (len(xs) - 1) >= 60
    for i, s in enumerate(series):
        colour, offset = PALETTE[i], (i - (len(series) - 1) / 2) * 8
        dash = ' stroke-dasharray="5 3"' if s.dashed else ""
        for run in _runs(s.points):  # a missing value breaks the line instead of bridging it
            path = " ".join(f"{xpos(x) + offset:.1f},{ypos(y):.1f}" for x, y in run)
            parts.append(
                f'<polyline points="{path}" fill="none" stroke="{colour}" '
                f'stroke-width="1.5"{dash}/>'
            )
        for p in s.points:
            x = xpos(p.x) + offset
            if p.y is None or not math.isfinite(p.y):
                if p.note and room_for_notes:
                    row_y = top + plot_h + 30 + 13 * noted.index(i)
                    # marker and text centred under the round, kept inside the frame
                    start = min(max(x - 24, 4.0), width - 8 - 6 * len(p.note) - 6)
                    parts.append(_marker(s.marker, start + 3, row_y - 3.5, colour, s.hollow, 0.7))
                    parts.append(
                        f'<text x="{start + 9:.1f}" y="{row_y:.1f}" font-size="10" '
                        f'fill="{INK}">{escape(p.note)}</text>'
                    )
                continue
            if p.lower is not None and p.upper is not None:
                ya, yb = ypos(p.lower), ypos(p.upper)
                parts.append(
                    f'<path d="M{x:.1f} {ya:.1f}V{yb:.1f}M{x - 4:.1f} {ya:.1f}h8M{x - 4:.1f} '
                    f'{yb:.1f}h8" stroke="{colour}" stroke-width="1.5" fill="none"/>'
                )
            parts.append(_marker(s.marker, x, ypos(p.y), colour, s.hollow))
    parts.append("</svg>")
    return "".join(parts)


def _runs(points: Sequence[Point]) -> list[list[tuple[float, float]]]:
    """Stretches of consecutive points (in x order) that all have a value, two or more long."""
    runs: list[list[tuple[float, float]]] = [[]]
    for p in sorted(points, key=lambda p: p.x):
        if p.y is None or not math.isfinite(p.y):
            runs.append([])
        else:
            runs[-1].append((p.x, p.y))
    return [r for r in runs if len(r) > 1]


def _number_text(value: float) -> str:
    return str(int(value)) if float(value).is_integer() else f"{value:g}"


def bar_chart(
    bars: Sequence[Bar],
    *,
    chart_id: str,
    title: str,
    description: str,
    value_label: str,
    width: int = 560,
    label_width: int = 150,
) -> str:
    """Horizontal bars from zero (negative values to the left), each labelled with its value.

    Parameters
    ----------
    bars : sequence of Bar
        Drawn top to bottom in the given order; a bar without a value shows its text only.
    label_width : int
        Room for the bar labels; longer labels are shortened with an ellipsis (the full label
        stays in the bar's tooltip and in the page's table).
    """
    row, top, bottom, right = 24, 12, 40, 64
    height = top + bottom + row * max(len(bars), 1)
    parts = _open(chart_id, title, description, width, height)
    values = [b.value for b in bars if b.value is not None and math.isfinite(b.value)]
    if not values:
        parts.append(
            f'<text x="{width / 2:.0f}" y="{height / 2:.0f}" text-anchor="middle" '
            f'fill="{INK}">no values yet</text></svg>'
        )
        return "".join(parts)
    ticks = nice_ticks(min(0.0, *values), max(0.0, *values), count=4)
    v0, v1 = ticks[0], ticks[-1]
    plot_left, plot_w = label_width + 8, width - label_width - 8 - right

    def xpos(v: float) -> float:
        return plot_left + plot_w * (v - v0) / (v1 - v0)

    plot_bottom = top + row * len(bars)
    for t in ticks:
        x = xpos(t)
        stroke = INK if t == 0 else GRID
        parts.append(
            f'<line x1="{x:.1f}" y1="{top}" x2="{x:.1f}" y2="{plot_bottom}" stroke="{stroke}"/>'
        )
        parts.append(
            f'<text x="{x:.1f}" y="{plot_bottom + 16}" text-anchor="middle" fill="{INK}">'
            f"{_tick_text(t, ticks)}</text>"
        )
    parts.append(
        f'<text x="{plot_left + plot_w / 2:.0f}" y="{height - 6}" text-anchor="middle" '
        f'fill="{INK}">{escape(value_label)}</text>'
    )
    for i, b in enumerate(bars):
        y = top + i * row
        label = b.label if len(b.label) <= 22 else b.label[:21] + "…"
        text = b.text if b.text is not None else ("n/a" if b.value is None else f"{b.value:.3g}")
        parts.append(f"<g><title>{escape(b.label)}: {escape(text)}</title>")
        parts.append(
            f'<text x="{label_width}" y="{y + 16}" text-anchor="end" fill="{INK}">'
            f"{escape(label)}</text>"
        )
        if b.value is not None and math.isfinite(b.value):
            start, end = sorted((xpos(0.0), xpos(b.value)))
            parts.append(
                f'<rect x="{start:.1f}" y="{y + 5}" width="{max(end - start, 1):.1f}" '
                f'height="{row - 10}" fill="{PALETTE[0]}"/>'
            )
        # values sit in their own column at the right, clear of bars and labels
        parts.append(
            f'<text x="{width - 6}" y="{y + 16}" text-anchor="end" fill="{INK}">'
            f"{escape(text)}</text></g>"
        )
    parts.append("</svg>")
    return "".join(parts)
