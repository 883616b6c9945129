"""Tokens, browser sign-in, sessions and CSRF: each refusal leaves the store unchanged."""

from __future__ import annotations

from datetime import timedelta
from html.parser import HTMLParser

from sqlalchemy import select, update

from expertloop.auth import security, service
from expertloop.auth.models import ApiToken, BrowserSession, User
from expertloop.deps import SESSION_COOKIE
from expertloop.models import utcnow
from tests.conftest import store_contents
from tests.helpers import DISCRETE_SPEC, sign_in_form


class _Inputs(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.values: dict[str, str] = {}
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "input" and a.get("name"):
            self.values[a["name"]] = a.get("value") or ""

    def handle_data(self, data):
        self.text.append(data)


def parse(html: str) -> _Inputs:
    parser = _Inputs()
    parser.feed(html)
    return parser


def sign_in(client, name="ann", password="correct horse"):
    return sign_in_form(client, name, password, "/")


def test_tokens_and_passwords_are_stored_only_as_hashes(app, make_user):
    header = make_user("annotator", name="ann", password="correct horse")
    token = header["Authorization"].split()[1]
    with app.state.session_factory() as session:
        stored = session.scalar(select(ApiToken.token_sha256))
        user = session.scalar(select(User).where(User.name == "ann"))
    assert stored == security.sha256_hex(token) and token not in stored
    assert user.password_hash.startswith("scrypt$") and "correct horse" not in user.password_hash
    assert len(token) >= 43  # 32 random bytes, url-safe base64


def test_password_hash_checks(app):
    stored = security.hash_password("s3cret", n=2**10)
    assert security.verify_password("s3cret", stored)
    assert not security.verify_password("s3creT", stored)
    assert security.hash_password("s3cret", n=2**10) != stored  # salted


def test_sign_in_sets_a_safe_cookie_and_sign_out_ends_it(client, make_user, engine):
    make_user("annotator", name="ann", password="correct horse")
    response = sign_in(client)
    assert response.status_code == 303
    cookie = response.headers["set-cookie"]
    assert "HttpOnly" in cookie and "samesite=lax" in cookie.lower() and "Secure" not in cookie
    home = client.get("/")
    assert home.status_code == 200
    csrf = parse(home.text).values["csrf_token"]
    out = client.post("/logout", data={"csrf_token": csrf}, follow_redirects=False)
    assert out.status_code == 303
    client.cookies.set(SESSION_COOKIE, response.cookies[SESSION_COOKIE])
    assert client.get("/api/me").status_code == 401


def test_wrong_password_is_refused(client, make_user, engine):
    make_user("annotator", name="ann", password="correct horse")
    before = store_contents(engine)
    response = sign_in(client, password="wrong")
    assert response.status_code == 401 and "wrong" in response.text
    assert store_contents(engine) == before


def test_missing_or_wrong_csrf_is_refused_and_changes_nothing(client, make_user, engine):
    make_user("admin", name="boss", password="correct horse")
    sign_in(client, name="boss")
    before = store_contents(engine)
    no_token = client.post("/api/loops", json=DISCRETE_SPEC)
    assert no_token.status_code == 403 and "CSRF" in no_token.json()["detail"]
    wrong = client.post("/api/loops", json=DISCRETE_SPEC, headers={"X-CSRF-Token": "nope"})
    assert wrong.status_code == 403
    assert store_contents(engine) == before
    csrf = parse(client.get("/").text).values["csrf_token"]
    ok = client.post("/api/loops", json=DISCRETE_SPEC, headers={"X-CSRF-Token": csrf})
    assert ok.status_code == 201


def test_expired_session_is_refused(client, app, make_user, engine):
    make_user("admin", name="boss", password="correct horse")
    sign_in(client, name="boss")
    csrf = parse(client.get("/").text).values["csrf_token"]
    with app.state.session_factory() as session:
        session.execute(update(BrowserSession).values(expires_at=utcnow() - timedelta(minutes=1)))
        session.commit()
    before = store_contents(engine)
    response = client.post("/api/loops", json=DISCRETE_SPEC, headers={"X-CSRF-Token": csrf})
    assert response.status_code == 401
    assert store_contents(engine) == before
    page = client.get("/", headers={"Accept": "text/html"}, follow_redirects=False)
    assert page.status_code == 303 and page.headers["location"].startswith("/login")


def test_wrong_and_revoked_tokens_are_refused(client, app, admin, engine):
    before = store_contents(engine)
    assert (
        client.post(
            "/api/loops", json=DISCRETE_SPEC, headers={"Authorization": "Bearer el_x"}
        ).status_code
        == 401
    )
    assert (
        client.post(
            "/api/loops", json=DISCRETE_SPEC, headers={"Authorization": "Basic abc"}
        ).status_code
        == 401
    )
    token = admin["Authorization"].split()[1]
    with app.state.session_factory.begin() as session:
        assert service.revoke_token(session, prefix=token[:10]) == 1
    revoked = client.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    assert revoked.status_code == 401
    after = store_contents(engine)
    # only the revocation itself changed the store: the token's row, and the access version
    # that tells every process's identity cache about it
    revocation = {"api_tokens", "access_version"}
    assert {k: v for k, v in after.items() if k not in revocation} == {
        k: v for k, v in before.items() if k not in revocation
    }
    assert after["access_version"][0][1] > before["access_version"][0][1]


def test_script_in_titles_and_feature_names_renders_escaped(client, admin, make_user):
    spec = {**DISCRETE_SPEC, "title": "<script>alert(1)</script> crossing"}
    assert client.post("/api/loops", json=spec, headers=admin).status_code == 201
    make_user("annotator", name="ann", password="correct horse")
    sign_in(client)
    html = client.get("/").text
    assert "<script>alert(1)</script>" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt; crossing" in html
    # feature names are restricted to lowercase identifiers, so markup cannot get in at all
    bad = {**DISCRETE_SPEC, "slug": "x-loop", "features": [{"name": "<script>", "unit": ""}]}
    assert client.post("/api/loops", json=bad, headers=admin).status_code == 422


def test_sign_in_redirect_stays_on_this_site(client, make_user):
    make_user("annotator", name="ann", password="correct horse")
    response = sign_in_form(client, "ann", "correct horse", "//evil.example/")
    assert response.headers["location"] == "/"
