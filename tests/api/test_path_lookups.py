"""Every route whose path names a loop (`{slug}`) or a round (`{number}`) answers an unknown one
with the same 404 and message, whatever else the request holds: the lookups are the loop
dependencies (app/loops/deps.py), resolved before the body is read."""

from __future__ import annotations

import re

from tests.helpers import DISCRETE_SPEC

SLUG = DISCRETE_SPEC["slug"]


def routes_with(client, name: str) -> list[tuple[str, str]]:
    """(method, path) of every route in the schema whose path has the parameter `name`."""
    paths = client.get("/openapi.json").json()["paths"]
    return sorted(
        (method.upper(), path)
        for path, operations in paths.items()
        if "{" + name + "}" in path
        for method in operations
        if method in ("get", "post", "put", "patch", "delete")
    )


def concrete(path: str, **given: str) -> str:
    return re.sub(r"\{([^}]+)\}", lambda m: given.get(m.group(1), "1"), path)


def test_an_unknown_loop_is_404_on_every_route_that_names_one(client, admin):
    routes = routes_with(client, "slug")
    assert len(routes) >= 25  # every loop route of the API and the pages
    for method, path in routes:
        url = concrete(path, slug="no-such-loop", version="v1", key="r0")
        got = client.request(method, url, headers={**admin, "Accept": "application/json"})
        assert got.status_code == 404, (method, path, got.status_code, got.text)
        assert got.json()["detail"] == "no loop with slug 'no-such-loop'", (method, path)


def test_an_unknown_round_is_404_on_every_route_that_names_one(client, admin):
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    routes = routes_with(client, "number")
    assert len(routes) >= 7  # close, rollouts (upload, list), ranking, selection, queue, report
    for method, path in routes:
        got = client.request(method, concrete(path, slug=SLUG, number="99"), headers=admin)
        assert got.status_code == 404, (method, path, got.status_code, got.text)
        assert got.json()["detail"] == f"loop '{SLUG}' has no round 99", (method, path)
