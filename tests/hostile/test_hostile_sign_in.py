"""Sign-in under attack: throttling per name and per address (429 with Retry-After), the same
work for unknown names as for wrong passwords, a CSRF token on the form, hostile form values,
and wrong passwords that never hold the SQLite write lock."""

from __future__ import annotations

import re
import threading
import time
from unittest import mock

import pytest
from fastapi.testclient import TestClient

from expertloop.auth import security
from expertloop.config import Settings
from expertloop.main import create_app
from tests.helpers import sign_in_form
from tests.hostile.conftest import row_counts

PASSWORD = "correct horse battery"


@pytest.fixture
def throttled_settings(settings: Settings) -> Settings:
    return settings.model_copy(
        update={"sign_in_failures_per_name": 3, "sign_in_failures_per_address": 6}
    )


@pytest.fixture
def throttled(throttled_settings):
    with TestClient(create_app(throttled_settings)) as client:
        yield client


def _error(response) -> str:
    found = re.search(r'class="error" role="alert">([^<]+)<', response.text)
    return found.group(1) if found else ""


def test_wrong_passwords_for_one_name_are_throttled_even_with_the_right_one(throttled, make_user):
    make_user("annotator", name="ann", password=PASSWORD)
    for _ in range(3):
        assert sign_in_form(throttled, "ann", "wrong").status_code == 401
    blocked = sign_in_form(throttled, "ann", PASSWORD)
    assert blocked.status_code == 429
    assert 0 < int(blocked.headers["retry-after"]) <= 900
    assert "Try again in" in _error(blocked)
    # another name from the same address is still let in until the address limit
    make_user("annotator", name="bea", password=PASSWORD)
    assert sign_in_form(throttled, "bea", PASSWORD).status_code == 303


def test_one_address_trying_many_names_is_throttled(throttled, make_user):
    make_user("annotator", name="ann", password=PASSWORD)
    for i in range(6):
        assert sign_in_form(throttled, f"guess-{i}", "x").status_code == 401
    blocked = sign_in_form(throttled, "ann", PASSWORD)
    assert blocked.status_code == 429 and int(blocked.headers["retry-after"]) > 0


def test_throttle_counts_in_a_sliding_window():
    from expertloop.auth.throttle import Limits, SignInThrottle

    now = [1000.0]
    throttle = SignInThrottle(Limits(2, 10, 60.0), clock=lambda: now[0])
    throttle.failed(name="Ann", address="a")
    now[0] += 30
    throttle.failed(name="ann", address="b")  # names count case-insensitively
    assert throttle.retry_after_s(name="ANN", address="c") == 30
    now[0] += 30.5
    assert throttle.retry_after_s(name="ann", address="c") == 0


def test_unknown_names_cost_the_same_hash_as_wrong_passwords(client, make_user):
    make_user("annotator", name="ann", password=PASSWORD)
    make_user("uploader", name="fleet")  # API-only: no password at all
    calls = []
    real = security.hashlib.scrypt

    def counting(*args, **kwargs):
        calls.append(kwargs.get("n"))
        return real(*args, **kwargs)

    security.dummy_hash()  # made once per process, before the first probe
    with mock.patch.object(security.hashlib, "scrypt", counting):
        for name, password in [
            ("ann", "wrong"),
            ("nobody", "wrong"),
            ("fleet", "x"),
            ("ann\x00", "x"),
            ("a" * 5000, "x"),
            ("ann", "p" * 5000),
        ]:
            calls.clear()
            assert sign_in_form(client, name, password).status_code == 401
            assert calls == [security.SCRYPT_N], (name[:10], calls)


def test_sign_in_form_without_its_csrf_token_is_refused(client, make_user, engine):
    make_user("annotator", name="ann", password=PASSWORD)
    before = row_counts(engine)
    # a form posted from another site carries neither the cookie nor the field
    forged = client.post(
        "/login", data={"name": "ann", "password": PASSWORD}, follow_redirects=False
    )
    assert forged.status_code == 403 and "expired" in _error(forged)
    client.cookies.clear()
    client.cookies.set("expertloop_signin_csrf", "other", path="/login")
    wrong = client.post(
        "/login",
        data={"name": "ann", "password": PASSWORD, "csrf_token": "guess"},
        follow_redirects=False,
    )
    assert wrong.status_code == 403
    assert row_counts(engine) == before
    assert sign_in_form(client, "ann", PASSWORD).status_code == 303


@pytest.mark.parametrize(
    ("name", "next_url"),
    [
        ("ann\x00", "/"),
        ("\u202eann", "/"),
        ("x" * 100_000, "/"),
        ("ann", "/\\evil.example"),
        ("ann", "/ok\r\nSet-Cookie: x=1"),
    ],
)
def test_hostile_form_values_get_a_plain_answer(client, make_user, engine, name, next_url):
    make_user("annotator", name="ann", password=PASSWORD)
    before = row_counts(engine)
    response = sign_in_form(client, name, PASSWORD, next_url)
    if name == "ann":
        assert response.status_code == 303 and response.headers["location"] == "/"
    else:
        assert response.status_code == 401 and _error(response) == "Name or password is wrong."
        assert row_counts(engine) == before
    assert client.get("/healthz").status_code == 200


def test_wrong_passwords_do_not_stall_other_writers(app, client, make_user):
    """While wrong-password sign-ins hash, another writer's transaction commits at once."""
    from expertloop.db import write_transaction
    from expertloop.jobs.models import Job

    make_user("annotator", name="ann", password=PASSWORD)
    gate = threading.Event()
    real = security.verify_password

    def slow_verify(password, stored):
        gate.wait(5)  # a very slow hash: the writer below must not wait for it
        return real(password, stored)

    with mock.patch.object(security, "verify_password", slow_verify):
        signing = threading.Thread(target=lambda: sign_in_form(client, "ann", "wrong"))
        signing.start()
        time.sleep(0.3)
        started = time.monotonic()
        with app.state.session_factory() as session, write_transaction(session):
            session.add(Job(kind="probe", params={}, status="done"))
        took = time.monotonic() - started
        gate.set()
        signing.join()
    assert took < 2.0, f"a writer waited {took:.1f} s behind a password hash"
