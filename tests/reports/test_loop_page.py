"""The loop page, parsed with html.parser: rounds table, charts with their tables, caution."""

from __future__ import annotations

from html.parser import HTMLParser

import pytest

from expertloop.templating import SAFETY_CAUTION
from tests.reports.scenario import build_discrete


class Page(HTMLParser):
    """Collects what the checks need: tags with attributes, text per element id, tables."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []
        self.tables: list[list[list[str]]] = []
        self._open: list[str] = []
        self._cell: list[str] | None = None
        self.by_id: dict[str, list[str]] = {}

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        self.tags.append((tag, attributes))
        if tag not in ("br", "img", "input", "meta", "link", "circle", "rect", "line",
                       "polygon", "polyline", "path"):  # fmt: skip
            self._open.append(attributes.get("id") or "")
        if tag == "table":
            self.tables.append([])
        elif tag == "tr" and self.tables:
            self.tables[-1].append([])
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None and self.tables:
            self.tables[-1][-1].append(" ".join(" ".join(self._cell).split()))
            self._cell = None
        if self._open and tag not in ("circle", "rect", "line", "polygon", "polyline", "path"):
            self._open.pop()

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell.append(data)
        for ident in self._open:
            if ident:
                self.by_id.setdefault(ident, []).append(data)

    def text_of(self, ident: str) -> str:
        return " ".join("".join(self.by_id.get(ident, [])).split())

    def all_text(self) -> str:
        return " ".join("".join(self.text).split())


def _page(client, slug, headers) -> Page:
    response = client.get(f"/loops/{slug}", headers=headers)
    assert response.status_code == 200, response.text
    assert response.headers["content-type"].startswith("text/html")
    parsed = Page()
    parsed.feed(response.text)
    return parsed


@pytest.fixture
def annotator(make_user):
    return make_user("annotator", name="page-reader")


def test_loop_page_tables_charts_and_caution(app, client, admin, uploader, make_user, annotator):
    world = build_discrete(app, client, admin, uploader, make_user, mode="two")
    page = _page(client, world.slug, annotator)
    rounds = page.tables[0]
    assert rounds[0][:3] == ["Round", "Learner", "States"]
    assert [r[0] for r in rounds[1:]] == ["0", "1"]
    audit_cell = rounds[2][rounds[0].index("Audit disagreement")]
    audit = client.get(f"/api/loops/{world.slug}/rounds/1/report", headers=annotator).json()
    audit = audit["audit"]["disagreement"]
    rate, lower, upper = (100 * audit[k] for k in ("rate", "lower", "upper"))
    # enough audit labels: the rate with its interval, as in the JSON report
    assert audit_cell == f"{rate:.1f}% {lower:.1f}–{upper:.1f}%, n={audit['n']}"
    svgs = [a for tag, a in page.tags if tag == "svg"]
    assert len(svgs) == 6  # five charts across rounds and the shifted features
    assert all(a.get("role") == "img" and a.get("aria-label") for a in svgs)
    titles = [a.get("id") for tag, a in page.tags if tag == "title" and a.get("id")]
    assert len(titles) == 6
    # every chart has a data table: the rounds table, six chart tables, the annotators table
    assert len(page.tables) == 8
    disagreement = page.tables[1]
    assert disagreement[0] == ["round", "audit sample", "ranked sample (biased)"]
    assert disagreement[1][:2] == ["1", f"{rate:.1f}% ({lower:.1f}–{upper:.1f}%, n={audit['n']})"]
    features = page.tables[6]
    assert features[0][0] == "feature" and features[1][0] == "gap_m"
    # the safety caution is on the page, in its own box
    assert SAFETY_CAUTION in page.text_of("safety")
    assert "not a safety case" in page.text_of("safety")
    links = {a.get("href") for tag, a in page.tags if tag == "a"}
    assert f"/loops/{world.slug}/bench" in links
    # annotators may not read snapshots, so the page does not offer them a link that refuses
    assert f"/api/loops/{world.slug}/snapshots" not in links
    assert f"/api/loops/{world.slug}/report.csv" in links
    assert not [tag for tag, _ in page.tags if tag == "script"]  # no scripts at all


def test_page_says_too_few_audit_labels(app, client, admin, uploader, make_user, annotator):
    world = build_discrete(app, client, admin, uploader, make_user, mode="three", n_audit=10)
    page = _page(client, world.slug, annotator)
    rounds = page.tables[0]
    audit_cell = rounds[2][rounds[0].index("Audit disagreement")]
    assert audit_cell.startswith("too few labels (")
    assert "%" not in audit_cell  # no number without meaning
    assert page.text_of("audit-warning").startswith("Round 1: too few audit labels:")


def test_title_with_markup_is_escaped(app, client, admin, uploader, make_user, annotator):
    title = '<script>alert("x")</script> & crossing'
    world = build_discrete(app, client, admin, uploader, make_user, mode="two", title=title)
    page = _page(client, world.slug, annotator)
    assert not [tag for tag, _ in page.tags if tag == "script"]
    assert page.text_of("loop-title") == title


def test_browser_without_session_is_sent_to_sign_in(client, admin):
    response = client.get(
        "/loops/anything", headers={"accept": "text/html"}, follow_redirects=False
    )
    assert response.status_code == 303 and response.headers["location"].startswith("/login")
