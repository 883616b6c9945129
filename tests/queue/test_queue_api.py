"""The queue over HTTP: what the bench receives, submit statuses, refusals, progress, the admins'
counts, and the bench page itself (parsed, not matched as text)."""

from __future__ import annotations

import json
from html.parser import HTMLParser
from typing import Any

import pytest
from pydantic import TypeAdapter

from expertloop.deps import SESSION_COOKIE
from expertloop.queue.schemas import ClaimRead, LabelRead
from tests.conftest import store_contents
from tests.helpers import CONTINUOUS_SPEC, DISCRETE_SPEC, sign_in_form

Q = "/api/loops/{slug}/queue"
LEARNER_FIELDS = {"learner_action", "learner_probs", "learner_ensemble", "learner_std"}


@pytest.fixture
def ann(make_user):
    return make_user("annotator", name="ann")


@pytest.fixture
def bea(make_user):
    return make_user("annotator", name="bea")


def claim(client, headers, slug="aisle-crossing"):
    response = client.post(Q.format(slug=slug) + "/claim", headers=headers)
    assert response.status_code == 200, response.text
    return response.json()["item"]


def submit(client, headers, item_id, body, slug="aisle-crossing"):
    return client.post(f"{Q.format(slug=slug)}/items/{item_id}/labels", json=body, headers=headers)


def test_a_claim_sends_the_state_and_earlier_steps_without_learner_outputs(
    discrete_loop, client, ann
):
    item = claim(client, ann)
    claim(client, ann)  # resuming: the same item (checked below)
    state = item["state"]
    assert not LEARNER_FIELDS & set(state)
    assert all(not LEARNER_FIELDS & set(step) for step in item["context"])
    assert (item["learner_shown"], item["learner_action"]) == (False, None)
    assert item["context"] == []  # the first state of its rollout has nothing before it
    assert item["lease_seconds"] == 300 and item["span_max_steps"] == 0
    assert claim(client, ann)["item_id"] == item["item_id"]


def test_context_holds_only_the_preceding_seconds(make_loop, client, ann, admin):
    slug = make_loop(DISCRETE_SPEC, settings={"context_seconds": 0.25}, queue=1, start=7)
    item = claim(client, ann, slug)
    times = [s["time_s"] for s in item["context"]]
    t = item["state"]["time_s"]
    # steps are 0.1 s apart: those within 0.25 s before step 7 are steps 5 and 6
    assert [s["step"] for s in item["context"]] == [5, 6]
    assert all(t - 0.25 <= x < t for x in times)
    full = client.get(f"/api/loops/{slug}/states/{item['state']['id']}", headers=admin).json()
    assert item["state"]["features"] == full["state"]["features"]


def test_the_learner_action_is_sent_only_on_items_that_show_it(make_loop, client, ann, admin):
    slug = make_loop(DISCRETE_SPEC, settings={"show_learner_fraction": 1.0}, queue=1)
    item = claim(client, ann, slug)
    stored = client.get(f"/api/loops/{slug}/states/{item['state']['id']}", headers=admin).json()
    assert item["learner_shown"] is True
    assert item["learner_action"] == stored["state"]["learner_action"] is not None
    body = {"submission_id": "shown-learner-1", "answer": "action", "action": 1}
    label = submit(client, ann, item["item_id"], body, slug).json()
    assert label["learner_shown"] is True  # recorded per label


def test_submit_is_created_once_and_a_repeat_returns_it(discrete_loop, client, ann, engine):
    item = claim(client, ann)
    body = {"submission_id": "api-submit-0001", "answer": "action", "action": 2}
    first = submit(client, ann, item["item_id"], body)
    assert first.status_code == 201, first.text
    assert first.json()["action"] == 2 and first.json()["action_name"] == "hold"
    before = store_contents(engine)
    again = submit(client, ann, item["item_id"], body)
    assert again.status_code == 200 and again.json()["repeated"] is True
    assert again.json()["id"] == first.json()["id"]
    assert store_contents(engine) == before


def test_refusals_name_the_problem_and_change_nothing(discrete_loop, client, ann, bea, engine):
    item = claim(client, ann)
    before = store_contents(engine)
    bad = submit(
        client,
        ann,
        item["item_id"],
        {"submission_id": "api-bad-0001", "answer": "action", "action": 7},
    )
    assert bad.status_code == 422 and bad.json()["detail"].startswith("action: index 7")
    not_held = submit(
        client, bea, item["item_id"], {"submission_id": "api-bad-0002", "answer": "unsure"}
    )
    assert not_held.status_code == 409 and "no live claim" in not_held.json()["detail"]
    unknown = submit(client, ann, 999_999, {"submission_id": "api-bad-0003", "answer": "unsure"})
    assert unknown.status_code == 404
    extra = submit(
        client, ann, item["item_id"], {"submission_id": "api-bad-0004", "answer": "unsure", "x": 1}
    )
    assert extra.status_code == 422
    assert store_contents(engine) == before


def test_continuous_submit_and_bounds(continuous_loop, client, ann):
    item = claim(client, ann, "aisle-speed")
    body = {"submission_id": "api-cont-00001", "answer": "action", "action": [2.1, 0.0]}
    refused = submit(client, ann, item["item_id"], body, "aisle-speed")
    assert refused.status_code == 422
    assert refused.json()["detail"].startswith("action[0] (speed_cmd): 2.1 is outside")
    body["action"] = [0.75, 0.125]
    stored = submit(client, ann, item["item_id"], body, "aisle-speed").json()
    assert stored["action"] == [0.75, 0.125] and stored["action_name"] is None


@pytest.mark.parametrize("slug", ["aisle-crossing", "aisle-speed"])
def test_claim_and_submit_answers_are_their_schemas_json(
    discrete_loop, continuous_loop, client, ann, slug
):
    """The claim and submit routes encode their answers themselves (app/json_answers.py): the
    bytes must be what FastAPI sends for the declared model (pydantic's JSON of it, by alias),
    with its content type and status, and the schema must still name the models."""
    claims = TypeAdapter(ClaimRead)
    labels = TypeAdapter(LabelRead)

    def canonical(adapter: TypeAdapter[Any], body: bytes) -> bytes:
        return adapter.dump_json(adapter.validate_json(body), by_alias=True)

    got = client.post(Q.format(slug=slug) + "/claim", headers=ann)
    assert got.status_code == 200 and got.headers["content-type"] == "application/json"
    assert got.content == canonical(claims, got.content)
    item = got.json()["item"]
    assert item["lease_expires_at"].endswith("Z")  # the zone, as UtcDatetime answers carry it
    action = 1 if slug == "aisle-crossing" else [0.75, 0.125]
    body = {"submission_id": f"json-{slug}", "answer": "action", "action": action}
    for status in (201, 200):  # stored, then the repeat
        sent = submit(client, ann, item["item_id"], body, slug)
        assert sent.status_code == status and sent.headers["content-type"] == "application/json"
        assert sent.content == canonical(labels, sent.content)
        assert sent.json()["repeated"] is (status == 200)
    paths = client.get("/openapi.json").json()["paths"]
    declared = {
        "/claim": ("200", "ClaimRead"),
        "/items/{item_id}/labels": ("201", "LabelRead"),
    }
    for path, (status, model) in declared.items():
        content = paths["/api/loops/{slug}/queue" + path]["post"]["responses"][status]["content"]
        assert content["application/json"]["schema"]["$ref"].endswith("/" + model)


def test_skip_renew_and_progress(discrete_loop, client, ann):
    base = Q.format(slug="aisle-crossing")
    first = claim(client, ann)
    renewed = client.post(f"{base}/items/{first['item_id']}/renew", headers=ann)
    assert renewed.status_code == 200
    assert renewed.json()["lease_expires_at"] >= first["lease_expires_at"]
    skipped = client.post(f"{base}/items/{first['item_id']}/skip", headers=ann)
    assert skipped.json() == {"item_id": first["item_id"], "skipped": True}
    lapsed = client.post(f"{base}/items/{first['item_id']}/renew", headers=ann)
    assert lapsed.status_code == 409  # a skipped item is no longer the annotator's
    second = claim(client, ann)
    assert second["item_id"] != first["item_id"]
    body = {"submission_id": "api-progress-01", "answer": "unsure"}
    assert submit(client, ann, second["item_id"], body).status_code == 201
    progress = client.get(f"{base}/progress", headers=ann).json()
    assert progress["labelled_today"] == 1
    assert progress["left_for_you"] == 18  # 20 queued, one skipped, one labelled
    assert progress["labels_missing"] == 19
    assert progress["expected_seconds_left"] is None  # one label gives no pace yet


def test_nothing_left_is_a_null_item(make_loop, client, ann):
    slug = make_loop(DISCRETE_SPEC, queue=1)
    item = claim(client, ann, slug)
    body = {"submission_id": "api-last-item-1", "answer": "action", "action": 0}
    assert submit(client, ann, item["item_id"], body, slug).status_code == 201
    assert claim(client, ann, slug) is None


def test_span_labels_over_http(make_loop, client, ann):
    slug = make_loop(DISCRETE_SPEC, settings={"span_labels": True, "span_max_steps": 4}, start=6)
    item = claim(client, ann, slug)
    assert item["span_max_steps"] == 4  # limited by the setting; six steps precede it
    body = {"submission_id": "api-span-00001", "answer": "action", "action": 1, "span_steps": 3}
    label = submit(client, ann, item["item_id"], body, slug).json()
    assert label["span_labels"] == 3


def test_admins_read_a_rounds_queue_counts(discrete_loop, client, ann, admin):
    item = claim(client, ann)
    body = {"submission_id": "api-counts-0001", "answer": "action", "action": 0}
    submit(client, ann, item["item_id"], body)
    counts = client.get("/api/loops/aisle-crossing/rounds/1/queue", headers=admin).json()
    assert counts == {
        "round": 1,
        "items": 20,
        "open": 19,
        "done": 1,
        "labels_needed": 20,
        "labels": 1,
        "unsure": 0,
        "span_labels": 0,
        "live_leases": 0,
        "skips": 0,
        "learner_shown_items": 0,
        "corrections": 0,
        "undone": 0,
    }


class _Page(HTMLParser):
    """Collects the tags and attributes the checks below need."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.config_text = ""
        self._in_config = False

    def handle_starttag(self, tag, attrs):
        found = dict(attrs)
        self.tags.append((tag, found))
        self._in_config = tag == "script" and found.get("id") == "bench-config"

    def handle_endtag(self, tag):
        self._in_config = False

    def handle_data(self, data):
        if self._in_config:
            self.config_text += data

    def all(self, tag, **attrs):
        return [
            a for t, a in self.tags if t == tag and all(a.get(k) == v for k, v in attrs.items())
        ]


def browser_session(client, make_user, name="pat"):
    make_user("annotator", name=name, password="a long passphrase")
    response = sign_in_form(client, name, "a long passphrase")
    assert response.status_code == 303
    return response.cookies[SESSION_COOKIE]


def test_the_bench_page_for_a_discrete_loop(discrete_loop, client, make_user):
    cookie = browser_session(client, make_user)
    client.cookies.set(SESSION_COOKIE, cookie)
    page_response = client.get("/loops/aisle-crossing/bench", headers={"accept": "text/html"})
    assert page_response.status_code == 200
    page = _Page()
    page.feed(page_response.text)
    config = json.loads(page.config_text)
    assert config["slug"] == "aisle-crossing" and config["action_space"]["kind"] == "discrete"
    buttons = page.all("button", **{"class": "action"})
    assert [b["data-action"] for b in buttons] == ["0", "1", "2"]
    assert [b["aria-keyshortcuts"] for b in buttons] == ["1", "2", "3"]
    assert page.all("button", id="unsure")[0]["aria-keyshortcuts"] == "u"
    assert page.all("button", id="skip")[0]["aria-keyshortcuts"] == "s"
    # scripts, styles and images come from this site only
    sources = [a.get("src") for t, a in page.tags if t in ("script", "img") and a.get("src")]
    sources += [a["href"] for t, a in page.tags if t == "link"]
    assert sources and all(s.startswith("/static/") for s in sources)
    # the page carries the session's CSRF token for its requests
    csrf = page.all("div", id="bench")[0]["data-csrf"]
    no_token = client.post("/api/loops/aisle-crossing/queue/claim")
    assert no_token.status_code == 403
    with_token = client.post(
        "/api/loops/aisle-crossing/queue/claim", headers={"x-csrf-token": csrf}
    )
    assert with_token.status_code == 200 and with_token.json()["item"] is not None


def test_the_bench_page_for_a_continuous_loop_shows_units_and_bounds(
    continuous_loop, client, make_user
):
    client.cookies.set(SESSION_COOKIE, browser_session(client, make_user))
    page = _Page()
    page.feed(client.get("/loops/aisle-speed/bench").text)
    ranges = page.all("input", type="range")
    numbers = page.all("input", type="number")
    dims = CONTINUOUS_SPEC["action_space"]["dimensions"]
    assert [(float(r["min"]), float(r["max"])) for r in ranges] == [
        (d["low"], d["high"]) for d in dims
    ]
    assert [(float(n["min"]), float(n["max"])) for n in numbers] == [
        (d["low"], d["high"]) for d in dims
    ]
    assert [n["aria-label"] for n in numbers] == [
        "speed_cmd in m/s, typed",
        "curvature in 1/m, typed",
    ]


def test_the_span_field_appears_only_when_the_loop_allows_span_labels(make_loop, client, make_user):
    make_loop(DISCRETE_SPEC, settings={"span_labels": True, "span_max_steps": 6}, queue=1)
    client.cookies.set(SESSION_COOKIE, browser_session(client, make_user))
    page = _Page()
    page.feed(client.get("/loops/aisle-crossing/bench").text)
    (field,) = page.all("input", id="span-steps")
    assert (field["min"], field["max"]) == ("0", "6")
    make_loop({**DISCRETE_SPEC, "slug": "no-spans"}, queue=1)
    plain = _Page()
    plain.feed(client.get("/loops/no-spans/bench").text)
    assert plain.all("input", id="span-steps") == []
