"""Every route in the OpenAPI schema admits exactly the roles this table declares.

A new route missing from ROUTE_ROLES fails test_every_route_is_declared, so no route ships without
a decision about who may call it. Admin is admitted everywhere.
"""

from __future__ import annotations

import re

import pytest

from tests.conftest import store_contents

ALL_ROLES = ("admin", "uploader", "annotator", "trainer")
READERS = {"uploader", "annotator", "trainer"}
PUBLIC = "public"

# (method, path) -> roles admitted besides admin, or PUBLIC
ROUTE_ROLES: dict[tuple[str, str], set[str] | str] = {
    ("GET", "/healthz"): PUBLIC,
    ("GET", "/readyz"): PUBLIC,
    ("GET", "/login"): PUBLIC,
    ("POST", "/login"): PUBLIC,
    ("POST", "/logout"): READERS,
    ("GET", "/"): READERS,
    ("GET", "/api/me"): READERS,
    ("POST", "/api/loops"): set(),
    ("GET", "/api/loops"): READERS,
    ("GET", "/api/loops/{slug}"): READERS,
    ("GET", "/api/loops/{slug}/rounds"): READERS,
    ("POST", "/api/loops/{slug}/rounds"): set(),
    ("POST", "/api/loops/{slug}/rounds/{number}/close"): set(),
    ("POST", "/api/loops/{slug}/rounds/{number}/rollouts"): {"uploader"},
    ("GET", "/api/loops/{slug}/rounds/{number}/rollouts"): READERS,
    ("GET", "/api/loops/{slug}/rollouts/{key}/steps"): READERS,
    ("GET", "/api/loops/{slug}/states/{step_id}"): READERS,
    ("GET", "/api/images/{sha256}"): {"annotator"},
    ("GET", "/metrics"): set(),
    ("GET", "/api/jobs/{job_id}"): READERS,
    ("POST", "/api/loops/{slug}/rounds/{number}/ranking"): set(),
    ("GET", "/api/loops/{slug}/rounds/{number}/selection"): READERS,
}

# extra route tables that later domains register here
try:
    from tests.access.route_roles_extra import EXTRA_ROUTE_ROLES

    ROUTE_ROLES.update(EXTRA_ROUTE_ROLES)
except ImportError:  # pragma: no cover - no extra routes yet
    pass


def schema_routes(client) -> set[tuple[str, str]]:
    spec = client.get("/openapi.json").json()
    return {
        (method.upper(), path)
        for path, operations in spec["paths"].items()
        for method in operations
        if method in ("get", "post", "put", "patch", "delete")
    }


def concrete(path: str) -> str:
    numeric = ("{number}", "{step_id}", "{job_id}", "{item_id}", "{label_id}")
    return re.sub(r"\{[^}]+\}", lambda m: "1" if m.group(0) in numeric else "x", path)


def test_every_route_is_declared(client):
    routes = schema_routes(client)
    undeclared = routes - set(ROUTE_ROLES)
    assert not undeclared, f"routes without a declared role: {sorted(undeclared)}"
    stale = set(ROUTE_ROLES) - routes
    assert not stale, f"declared routes that no longer exist: {sorted(stale)}"


@pytest.fixture
def tokens(make_user):
    return {role: make_user(role, name=f"matrix-{role}") for role in ALL_ROLES}


def test_role_matrix(client, engine, tokens):
    routes = sorted(schema_routes(client))
    before = store_contents(engine)
    for method, path in routes:
        admitted = ROUTE_ROLES[(method, path)]
        if admitted == PUBLIC:
            continue
        url = concrete(path)
        anonymous = client.request(method, url, follow_redirects=False)
        assert anonymous.status_code in (401, 303), (method, path, anonymous.status_code)
        if anonymous.status_code == 303:  # pages send browsers to the sign-in form
            assert anonymous.headers["location"].startswith("/login")
        bad = client.request(method, url, headers={"Authorization": "Bearer el_not-a-token"})
        assert bad.status_code == 401, (method, path)
        for role in ALL_ROLES:
            if role == "admin" or role in admitted:
                continue
            refused = client.request(method, url, headers=tokens[role])
            assert refused.status_code == 403, (method, path, role, refused.status_code)
    assert store_contents(engine) == before, "a refused request changed the store"
    for method, path in routes:
        admitted = ROUTE_ROLES[(method, path)]
        if admitted == PUBLIC:
            continue
        for role in {"admin", *admitted}:
            allowed = client.request(method, concrete(path), headers=tokens[role])
            assert allowed.status_code not in (401, 403), (method, path, role, allowed.text)
