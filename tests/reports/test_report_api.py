"""Report endpoints: JSON per round, the table across rounds and its CSV (run on both backends)."""

from __future__ import annotations

import csv
import io

import pytest

from expertloop.loops import service as loops_service
from expertloop.queue.models import Label
from expertloop.reports import service
from expertloop.reports.schemas import RoundReportRow
from tests.helpers import DISCRETE_SPEC
from tests.reports import builders
from tests.reports.scenario import build_discrete


@pytest.fixture
def world(app, client, admin, uploader, make_user):
    return build_discrete(app, client, admin, uploader, make_user, mode="three")


@pytest.fixture
def reader(make_user):
    return make_user("trainer", name="report-reader")


def test_round_report_json_is_the_service_report(app, client, world, reader):
    response = client.get(f"/api/loops/{world.slug}/rounds/1/report", headers=reader)
    assert response.status_code == 200, response.text
    body = response.json()
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=world.slug)
        expected = service.compute_round_report(session, loop=loop, number=1)
    assert body == expected.model_dump(mode="json")
    consensus = world.consensus()
    assert body["audit"]["disagreement"]["n"] == sum(s in consensus for s in world.audit)
    assert body["counts"]["labels"] == len(world.votes)
    assert body["ranked"]["biased"] is True and body["audit"]["biased"] is False


def test_unknown_loop_or_round_and_missing_credentials(client, world, reader):
    missing_round = client.get(f"/api/loops/{world.slug}/rounds/9/report", headers=reader)
    assert missing_round.status_code == 404
    assert "has no round 9" in missing_round.json()["detail"]
    assert client.get("/api/loops/nope/report", headers=reader).status_code == 404
    assert client.get(f"/api/loops/{world.slug}/report.csv").status_code == 401


def test_report_follows_new_labels(app, client, world, reader):
    url = f"/api/loops/{world.slug}/rounds/1/report"
    first = client.get(url, headers=reader).json()
    assert client.get(url, headers=reader).json() == first  # unchanged data, same report
    spare = next(s for s in world.learner if s not in set(world.audit) | set(world.ranked))
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=world.slug)
        round_id = loops_service.get_round(session, loop=loop, number=1).id
        session.add(
            Label(step_id=spare, round_id=round_id, user_id=world.users["ann-a"],
                  submission_id="late-1", answer="action", action=0, created_at=builders.T0)
        )  # fmt: skip
        session.commit()
    later = client.get(url, headers=reader).json()
    assert later["counts"]["labels"] == first["counts"]["labels"] + 1


def test_table_across_rounds_and_its_csv(client, world, reader):
    table = client.get(f"/api/loops/{world.slug}/report", headers=reader)
    assert table.status_code == 200
    body = table.json()
    assert body["total"] == 2 and [r["round"] for r in body["items"]] == [0, 1]
    one = client.get(f"/api/loops/{world.slug}/rounds/1/report", headers=reader).json()
    row = body["items"][1]
    assert row["audit_disagreement"] == one["audit"]["disagreement"]["rate"]
    assert row["audit_lower"] == one["audit"]["disagreement"]["lower"]
    assert row["shift_mmd2"] == one["shift"]["mmd2"]
    assert row["krippendorff_alpha"] == one["agreement"]["krippendorff"][0]["alpha"]
    assert row["most_shifted_feature"] == "gap_m"

    response = client.get(f"/api/loops/{world.slug}/report.csv", headers=reader)
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("text/csv")
    assert "attachment" in response.headers["content-disposition"]
    rows = list(csv.DictReader(io.StringIO(response.text)))  # the standard csv module
    assert list(rows[0]) == list(RoundReportRow.model_fields)
    assert len(rows) == 2
    assert rows[0]["audit_disagreement"] == ""  # round 0 has no learner: an empty cell
    for name in ("audit_disagreement", "audit_lower", "audit_upper", "shift_p_value"):
        assert float(rows[1][name]) == body["items"][1][name]  # repr precision round-trips
    assert int(rows[1]["labels"]) == len(world.votes)


def test_csv_neutralises_spreadsheet_formulas(app, client, admin, reader):
    slug = builders.create_loop(client, admin, {**DISCRETE_SPEC, "slug": "formula"})
    builders.open_round(client, admin, slug, "=HYPERLINK(1)")
    rows = list(
        csv.DictReader(
            io.StringIO(client.get(f"/api/loops/{slug}/report.csv", headers=reader).text)
        )
    )
    # OWASP guidance on CSV injection: a cell starting with = is prefixed with a quote
    assert rows[1]["learner_version"] == "'=HYPERLINK(1)"
