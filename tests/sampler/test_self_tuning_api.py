"""Self-tuning through the API: labelled rounds fit a disagreement model, which ranks the next
round once it has enough disagreements; the report and the loop page show it."""

from __future__ import annotations

import uuid

import pytest

from tests.helpers import DISCRETE_SPEC, discrete_rows
from tests.sampler.rounds import SLUG, rank, upload


def _rank_and_label(client, app, settings, admin, annotator, number, budget=12):
    job = rank(client, app, settings, admin, budget, seed=number, number=number)
    while True:  # the expert always says "hold": the learner disagrees wherever it did not
        item = client.post(f"/api/loops/{SLUG}/queue/claim", headers=annotator).json()["item"]
        if item is None:
            return job
        client.post(
            f"/api/loops/{SLUG}/queue/items/{item['item_id']}/labels",
            json={"submission_id": uuid.uuid4().hex, "answer": "action", "action": 2},
            headers=annotator,
        )


@pytest.mark.parametrize("enabled", [True, False])
def test_labelled_round_tunes_the_next_ranking(
    client, app, settings, admin, uploader, make_user, enabled
):
    annotator = make_user("annotator")
    spec = {
        **DISCRETE_SPEC,
        "settings": {
            "audit_fraction": 0.5,
            # counted as the fit weighs them: the first round's 6 disagreements (2 of them
            # audit rows, which stand for the unchosen candidates) count as 2.3
            "tuning_min_disagreements": 2,
            "self_tuning": enabled,
        },
    }
    assert client.post("/api/loops", json=spec, headers=admin).status_code == 201
    client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin)
    upload(client, uploader, discrete_rows(2, 30, expert=True, prefix="demo", seed=1), 0)
    upload(client, uploader, discrete_rows(4, 40, seed=2), 1)
    first = _rank_and_label(client, app, settings, admin, annotator, 1)
    assert first["result"]["self_tuning"]["used"] is False
    assert first["result"]["methods"]["score"] == "weighted mean of percentiles"

    client.post(f"/api/loops/{SLUG}/rounds", json={"learner_version": "v2"}, headers=admin)
    upload(client, uploader, discrete_rows(4, 40, seed=3, prefix="s"), 2)
    second = _rank_and_label(client, app, settings, admin, annotator, 2)
    selection = client.get(f"/api/loops/{SLUG}/rounds/2/selection", headers=admin).json()
    record = selection["params"]["self_tuning"]
    report = client.get(f"/api/loops/{SLUG}/rounds/2/report", headers=admin).json()
    page = client.get(f"/loops/{SLUG}", headers=admin).text
    if not enabled:
        assert second["result"]["self_tuning"] == {
            "used": False,
            "why": "self-tuning is switched off for this loop",
        }
        assert "model" not in record
        assert report["self_tuning"]["used"] is False and report["self_tuning"]["weights"] is None
        return
    assert second["result"]["self_tuning"]["used"] is True, second["result"]
    assert second["result"]["methods"]["score"] == "predicted disagreement"
    model = record["model"]
    assert model["n_labelled"] == 12 and 3 <= model["n_disagreements"] <= 9
    assert 2 <= min(model["effective_disagreements"], model["effective_agreements"]) < 3
    assert set(model["weights"]) == {"uncertainty_pct", "novelty_pct", "near_takeover"}
    # every chosen state's score is a probability now, and no boost is added on top
    assert all(0 < i["score"] < 1 and i["boost"] == 0 for i in selection["items"])
    tuned = report["self_tuning"]
    assert tuned["used"] is True and tuned["weights"] == model["weights"]
    calibration = tuned["audit_calibration"]
    assert calibration["n"] == 6 and 0 <= calibration["brier"] <= 1
    assert sum(b["n"] for b in calibration["bins"]) == 6
    assert 'id="tuning-table"' in page and "predicted disagreement" in page
