"""Every route whose path names a loop (`{slug}`) or a round (`{number}`) answers an unknown one
with the same 404 and message, whatever else the request holds: the lookups are the loop
dependencies (app/loops/deps.py), resolved before the body is read."""

from __future__ import annotations

import re

from tests.helpers import DISCRETE_SPEC, discrete_rows, parquet_bytes

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


def test_a_long_unknown_name_in_the_address_is_cut_in_the_answer(client, admin):
    """Found by fuzzing from outside: a 5,000-character slug, rollout key or snapshot version
    came back whole in the 404 or 422. A message repeats at most 80 characters of a value,
    cut with "…" (README, "Limits on what clients send"), and escapes bidirectional controls."""
    long = "a" * 5000
    cut = "a" * 79 + "…"
    for method, path in routes_with(client, "slug"):
        url = concrete(path, slug=long, version="v1", key="r0")
        got = client.request(method, url, headers={**admin, "Accept": "application/json"})
        assert got.status_code == 404, (method, path, got.status_code)
        assert got.json()["detail"] == f"no loop with slug '{cut}'", (method, path)
        assert len(got.content) < 300, (method, path)
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    key = client.get(f"/api/loops/{SLUG}/rollouts/{long}/steps", headers=admin)
    assert key.status_code == 404
    assert key.json()["detail"] == f"loop '{SLUG}' has no rollout '{cut}'"
    hidden = client.get(f"/api/loops/{SLUG}/rollouts/r0\u202e/steps", headers=admin)
    assert hidden.json()["detail"] == f"loop '{SLUG}' has no rollout 'r0\\u202e'"
    seed = parquet_bytes(discrete_rows(1, 4, expert=True))
    sent = client.post(
        f"/api/loops/{SLUG}/rounds/0/rollouts", files={"file": ("d.parquet", seed)}, headers=admin
    )
    assert sent.status_code == 201, sent.text
    assert client.post(f"/api/loops/{SLUG}/snapshots", json={}, headers=admin).status_code == 201
    for path in ("/snapshots/v{}", "/snapshots/v{}/export", "/snapshots/v1/export?since=v{}"):
        got = client.get(f"/api/loops/{SLUG}" + path.format("1" * 5000), headers=admin)
        assert got.status_code == 422, (path, got.status_code)
        assert len(got.content) < 300, path
        assert got.json()["detail"].endswith("got 'v" + "1" * 78 + "…'"), path
