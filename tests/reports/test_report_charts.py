"""Server-drawn SVG charts: well-formed, accessible, escaped, and placing values where they belong."""

from __future__ import annotations

import xml.etree.ElementTree as ET

import pytest

from expertloop.reports import charts

SVG = "{http://www.w3.org/2000/svg}"


def _parse(svg: str) -> ET.Element:
    return ET.fromstring(svg)  # raises on malformed XML, e.g. an unescaped "<" or "&"


def _two_series() -> list[charts.Series]:
    return [
        charts.Series(
            "audit <sample> & co",
            [charts.Point(1, 0.5, 0.25, 0.75), charts.Point(2, None, note="too few")],
        ),
        charts.Series(
            "ranked", [charts.Point(1, 0.25), charts.Point(2, 1.0)], marker="square", hollow=True
        ),
    ]


def test_point_chart_is_an_accessible_image_with_escaped_text():
    svg = charts.point_chart(
        _two_series(),
        chart_id="c1",
        title='Disagreement "by round" <all>',
        description="desc & more",
        y_label="rate",
        y_floor=0.0,
        y_ceiling=1.0,
    )
    root = _parse(svg)
    assert root.get("role") == "img"
    assert root.get("aria-label") == 'Disagreement "by round" <all>'
    assert root.find(f"{SVG}title").text == 'Disagreement "by round" <all>'
    assert root.find(f"{SVG}desc").text == "desc & more"
    texts = [t.text for t in root.iter(f"{SVG}text")]
    assert "audit <sample> & co" in texts  # the legend names each series in words
    assert "too few" in texts  # a missing value says why instead of vanishing
    # series differ by shape as well as colour: circles for one, squares for the other
    # legend, the one point with a value, and the small marker beside the "too few" note
    assert len(list(root.iter(f"{SVG}circle"))) == 3
    hollow = [r for r in root.iter(f"{SVG}rect") if r.get("fill") == charts.PAPER]
    assert len(hollow) == 3  # legend + two points, drawn hollow


def test_point_chart_places_values_on_a_linear_axis():
    svg = charts.point_chart(
        _two_series(), chart_id="c2", title="t", description="d", y_label="rate",
        y_floor=0.0, y_ceiling=1.0, height=260,
    )  # fmt: skip
    root = _parse(svg)
    top, plot_h = 34, 260 - 34 - 40 - 13  # the chart's margins, one row for a series' notes
    point = [c for c in root.iter(f"{SVG}circle")][1]
    # linear scale (common practice): 0.5 on a 0..1 axis sits halfway down the plot
    assert float(point.get("cy")) == pytest.approx(top + plot_h / 2, abs=0.06)
    bar = next(p for p in root.iter(f"{SVG}path"))
    d = bar.get("d")  # the interval bar runs from 0.25 to 0.75
    y_lower, y_upper = float(d.split("V")[0].split()[1]), float(d.split("V")[1].split("M")[0])
    assert y_lower == pytest.approx(top + plot_h * 0.75, abs=0.06)
    assert y_upper == pytest.approx(top + plot_h * 0.25, abs=0.06)


def test_charts_without_values_say_so():
    empty = charts.point_chart(
        [charts.Series("audit", [charts.Point(1, None)])],
        chart_id="e", title="t", description="d", y_label="y",
    )  # fmt: skip
    assert "no values yet" in [t.text for t in _parse(empty).iter(f"{SVG}text")]
    bars = charts.bar_chart([], chart_id="b", title="t", description="d", value_label="v")
    assert "no values yet" in [t.text for t in _parse(bars).iter(f"{SVG}text")]


def test_bar_chart_draws_signed_bars_from_zero_with_their_values():
    svg = charts.bar_chart(
        [
            charts.Bar("a_very_long_feature_name_indeed", 2.0, "2"),
            charts.Bar("speed", -1.0, "-1"),
            charts.Bar("gone", None),
        ],
        chart_id="b1",
        title="Shift <features>",
        description="d",
        value_label="SMD",
    )
    root = _parse(svg)
    assert root.get("role") == "img" and root.get("aria-label") == "Shift <features>"
    bars = [r for r in root.iter(f"{SVG}rect") if r.get("fill") == charts.PALETTE[0]]
    assert len(bars) == 2
    positive, negative = bars
    # the zero line is where the negative bar ends and the positive one starts
    zero = float(positive.get("x"))
    # (coordinates are written with one decimal)
    assert float(negative.get("x")) + float(negative.get("width")) == pytest.approx(zero, abs=0.1)
    assert float(positive.get("width")) == pytest.approx(2 * float(negative.get("width")), abs=0.2)
    texts = [t.text for t in root.iter(f"{SVG}text")]
    assert "a_very_long_feature_n…" in texts  # 21 characters and an ellipsis
    assert "n/a" in texts and "-1" in texts
    titles = [t.text for t in root.iter(f"{SVG}title")]
    assert "a_very_long_feature_name_indeed: 2" in titles  # full label kept for the tooltip


@pytest.mark.parametrize(
    ("low", "high", "expected"),
    [
        # steps of 1, 2, 2.5 or 5 times a power of ten (common practice for axis ticks)
        (0.0, 1.0, [0.0, 0.25, 0.5, 0.75, 1.0]),
        (0.0, 0.37, [0.0, 0.1, 0.2, 0.3, 0.4]),
        (-1.3, 2.2, [-2.0, -1.0, 0.0, 1.0, 2.0, 3.0]),
        # one value: the range is widened to [5, 10], whose raw step 1.25 rounds up to 2
        (5.0, 5.0, [4.0, 6.0, 8.0, 10.0]),
    ],
)
def test_nice_ticks(low, high, expected):
    assert charts.nice_ticks(low, high) == pytest.approx(expected)


def test_a_missing_value_breaks_the_line():
    points = [
        charts.Point(1, 0.2),
        charts.Point(2, 0.3),
        charts.Point(3, None),
        charts.Point(4, 0.1),
    ]
    svg = charts.point_chart(
        [charts.Series("kappa", points)], chart_id="g", title="t", description="d", y_label="y"
    )
    lines = list(_parse(svg).iter(f"{SVG}polyline"))
    # rounds 1-2 joined; round 4 stands alone rather than being bridged from round 2
    assert len(lines) == 1 and len(lines[0].get("points").split()) == 2
