"""Browser routes answer errors as pages in the site's layout; API routes keep JSON.

Pages are parsed with html.parser (the loop page tests' Page collector).
"""

from __future__ import annotations

from urllib.parse import parse_qs, urlsplit

import pytest
from fastapi.testclient import TestClient

from expertloop.error_pages import safe_next
from tests.access.test_sign_in import sign_in
from tests.helpers import DISCRETE_SPEC, sign_in_form
from tests.reports.test_loop_page import Page

BROWSER = {"accept": "text/html,application/xhtml+xml,*/*;q=0.8"}


def parsed(response) -> Page:
    assert response.headers["content-type"].startswith("text/html"), response.text
    page = Page()
    page.feed(response.text)
    return page


@pytest.mark.parametrize("accept", [BROWSER, {}])
def test_signed_out_page_goes_to_sign_in_with_next(client, accept):
    response = client.get("/loops/x/bench?focus=1", headers=accept, follow_redirects=False)
    assert response.status_code == 303
    location = urlsplit(response.headers["location"])
    assert location.path == "/login"
    assert parse_qs(location.query)["next"] == ["/loops/x/bench?focus=1"]
    home = client.get("/", follow_redirects=False)
    assert home.status_code == 303 and home.headers["location"] == "/login?next=%2F"
    form = parsed(client.get("/login?next=/loops/x/bench%3Ffocus%3D1"))
    hidden = [a for tag, a in form.tags if tag == "input" and a.get("name") == "next"]
    assert hidden[0]["value"] == "/loops/x/bench?focus=1"


@pytest.mark.parametrize(
    "target, kept",
    [
        ("/loops/a/bench", "/loops/a/bench"),
        ("/?x=1", "/?x=1"),
        ("//evil.example/", "/"),
        ("/\\evil.example", "/"),
        ("https://evil.example/", "/"),
        ("evil", "/"),
        ("/a\r\nSet-Cookie: x", "/"),
        ("", "/"),
    ],
)
def test_next_is_only_a_local_path(target, kept):
    assert safe_next(target) == kept


def test_signed_in_sign_in_returns_to_next(client, make_user):
    make_user("annotator", name="ann", password="correct horse")
    response = sign_in_form(client, "ann", "correct horse", "/loops/x/bench")
    assert response.headers["location"] == "/loops/x/bench"


def test_api_routes_keep_json(client):
    response = client.get("/api/loops", headers=BROWSER)
    assert response.status_code == 401 and "detail" in response.json()
    missing = client.get("/api/no-such-thing", headers=BROWSER)
    assert missing.status_code == 404 and missing.json() == {"detail": "Not Found"}
    assert (
        client.get("/metrics", headers=BROWSER)
        .headers["content-type"]
        .startswith("application/json")
    )


def test_forbidden_and_missing_pages(client, admin, make_user):
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    make_user("trainer", name="tess", password="correct horse")
    sign_in(client, name="tess")
    forbidden = client.get("/loops/aisle-crossing/bench", headers=BROWSER)
    assert forbidden.status_code == 403
    page = parsed(forbidden)
    assert page.text_of("error-title") == "Not for your role"
    assert "annotator" in page.text_of("error-message")
    assert any(tag == "footer" for tag, _ in page.tags)  # the site's layout, caution included
    for path in ("/loops/no-such-loop", "/no/such/page"):
        missing = client.get(path, headers=BROWSER)
        assert missing.status_code == 404
        assert parsed(missing).text_of("error-title") == "No such page"
    # an API client asking a browser route for JSON gets JSON
    as_json = client.get("/loops/no-such-loop", headers={"accept": "application/json"})
    assert as_json.status_code == 404 and "detail" in as_json.json()


def test_loop_page_links_snapshots_only_for_roles_that_may_read_them(client, admin, make_user):
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    make_user("annotator", name="ann", password="correct horse")
    sign_in(client)
    page = parsed(client.get("/loops/aisle-crossing"))
    links = [a.get("href") for tag, a in page.tags if tag == "a"]
    assert "/api/loops/aisle-crossing/snapshots" not in links
    assert "/loops/aisle-crossing/bench" in links


def test_server_error_is_a_page_for_browsers_and_json_for_api(app, make_user, monkeypatch):
    from expertloop.loops import service as loops_service

    def broken(*args, **kwargs):
        raise RuntimeError("simulated failure")

    monkeypatch.setattr(loops_service, "list_loops", broken)
    make_user("annotator", name="ann", password="correct horse")
    with TestClient(app, raise_server_exceptions=False) as client:
        sign_in(client)
        page = client.get("/", headers=BROWSER)
        assert page.status_code == 500
        assert parsed(page).text_of("error-title") == "Something went wrong"
        assert "simulated" not in page.text  # no internals shown
        api = client.get("/api/loops")
        assert api.status_code == 500 and "detail" in api.json()


def test_wrong_password_keeps_the_name(client, make_user):
    make_user("annotator", name="ann", password="correct horse")
    response = sign_in_form(client, "ann", "wrong", "/")
    assert response.status_code == 401
    page = parsed(response)
    name = [a for tag, a in page.tags if tag == "input" and a.get("id") == "name"][0]
    password = [a for tag, a in page.tags if tag == "input" and a.get("id") == "password"][0]
    assert name["value"] == "ann" and "autofocus" in password and "value" not in password


def test_every_page_names_our_favicon(client):
    page = parsed(client.get("/login"))
    icons = [a["href"] for tag, a in page.tags if tag == "link" and a.get("rel") == "icon"]
    assert icons == ["/static/favicon.svg"]
    icon = client.get(icons[0])
    assert icon.status_code == 200 and icon.headers["content-type"].startswith("image/svg+xml")
    assert icon.text.startswith("<svg")
