"""Per-request overhead: a token-authenticated `GET /api/me` against a bare FastAPI route.

    python bench/request_overhead.py                      # SQLite in a temporary folder
    python bench/request_overhead.py --postgres postgresql+psycopg://postgres@127.0.0.1:5432/DBNAME
                                               # SQLite, then PostgreSQL; DBNAME IS EMPTIED

Baseline, measured in the same run on the same machine: a FastAPI application with one route and
nothing else (no middleware, no dependencies) that answers the same JSON as `/api/me`. Two ways,
each side by side with its baseline, in alternating rounds so that a change in machine load hits
both alike:

- "over HTTP": each application in its own uvicorn process (one worker, same options), one
  client on loopback sending requests one after another on a kept-alive connection, with the
  standard library's http.client (which adds little of its own, so the ratio shows the
  servers' difference), and again with httpx (what our CLI and most Python clients use);
- "in process": the ASGI application called directly on an event loop (uvloop, as uvicorn
  uses, when installed), without a server or a socket: only what the framework and our code add.

Prints the median and the 99th percentile of each, and the ratio of medians (`/api/me` over the
bare route). Target (issue #18): at most 1.5x over HTTP on both backends. `/healthz` (no
credentials, no store access) is shown for comparison.
"""

from __future__ import annotations

import argparse
import asyncio
import http.client
import json
import os
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import numpy as np
from fastapi import FastAPI

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

USER = "bench-expert"
ROLES = ["annotator"]

# The baseline: uvicorn imports this module as `request_overhead:bare` (--app-dir bench).
bare = FastAPI()


@bare.get("/bare")
async def bare_route() -> dict[str, Any]:
    return {"name": USER, "roles": ROLES}


@bare.get("/healthz")
async def bare_health() -> dict[str, str]:
    return {"status": "ok"}  # server_process waits for it


def prepare(url: str) -> str:
    """Migrate an empty store and create one annotator; return its API token."""
    from expertloop.auth import service as auth_service
    from expertloop.db import make_engine, make_session_factory
    from tests.serving import upgrade_empty

    upgrade_empty(url)
    engine = make_engine(url)
    with make_session_factory(engine).begin() as session:  # auth's functions leave the commit
        user = auth_service.create_user(session, name=USER, roles=ROLES)
        token = auth_service.issue_token(session, user=user)
    engine.dispose()
    return token


# --- over HTTP -------------------------------------------------------------------------------


def http_timer(base: str, path: str, headers: dict[str, str]) -> Callable[[int], list[float]]:
    """A function sending `n` GETs of `path` one after another; returns their durations."""
    host, port = base.removeprefix("http://").split(":")
    conn = http.client.HTTPConnection(host, int(port), timeout=30)
    expected = _expected(path)

    def run(n: int) -> list[float]:
        times: list[float] = []
        while len(times) < n:
            t = time.perf_counter()
            try:
                conn.request("GET", path, headers=headers)
                response = conn.getresponse()
            except (http.client.RemoteDisconnected, ConnectionResetError, BrokenPipeError):
                # the server closed a connection left idle past its keep-alive time (while the
                # other targets had their turn): reconnect, and do not count this one
                conn.close()
                continue
            body = response.read()
            times.append(time.perf_counter() - t)
            if response.status != 200 or json.loads(body) != expected:
                raise SystemExit(f"GET {path}: {response.status} {body[:200]!r}")
        return times

    run(50)  # open the connection and warm both sides before the clock counts
    return run


def httpx_timer(base: str, path: str, headers: dict[str, str]) -> Callable[[int], list[float]]:
    """As http_timer, with an httpx client."""
    client = httpx.Client(base_url=base, headers=headers, timeout=30)
    expected = _expected(path)

    def run(n: int) -> list[float]:
        times = []
        for _ in range(n):
            t = time.perf_counter()
            response = client.get(path)
            times.append(time.perf_counter() - t)
            if response.status_code != 200 or response.json() != expected:
                raise SystemExit(f"GET {path}: {response.status_code} {response.text[:200]}")
        return times

    run(50)
    return run


def _expected(path: str) -> dict[str, Any]:
    if path == "/healthz":
        return {"status": "ok"}
    return {"name": USER, "roles": ROLES}


# --- in process ------------------------------------------------------------------------------


def asgi_timer(
    app: Any, path: str, headers: dict[str, str], loop: asyncio.AbstractEventLoop
) -> Callable[[int], list[float]]:
    """A function calling the ASGI app `n` times for GET `path`; returns the durations."""
    scope = {
        "type": "http",
        "asgi": {"version": "3.0"},
        "http_version": "1.1",
        "method": "GET",
        "scheme": "http",
        "path": path,
        "raw_path": path.encode(),
        "root_path": "",
        "query_string": b"",
        "headers": [(b"host", b"bench")]
        + [(k.lower().encode(), v.encode()) for k, v in headers.items()],
        "client": ("127.0.0.1", 50000),
        "server": ("bench", 80),
        "state": {},
    }
    expected = _expected(path)

    async def one() -> tuple[int, bytes]:
        sent: list[dict[str, Any]] = []

        async def receive() -> dict[str, Any]:
            return {"type": "http.request", "body": b"", "more_body": False}

        async def send(message: dict[str, Any]) -> None:
            sent.append(message)

        await app(dict(scope), receive, send)
        body = b"".join(m.get("body", b"") for m in sent if m["type"] == "http.response.body")
        return sent[0]["status"], body

    async def many(n: int) -> list[float]:
        times = []
        for _ in range(n):
            t = time.perf_counter()
            status, body = await one()
            times.append(time.perf_counter() - t)
            if status != 200 or json.loads(body) != expected:
                raise SystemExit(f"ASGI GET {path}: {status} {body[:200]!r}")
        return times

    def run(n: int) -> list[float]:
        return loop.run_until_complete(many(n))

    run(50)
    return run


# --- side by side ----------------------------------------------------------------------------


def new_event_loop() -> asyncio.AbstractEventLoop:
    try:
        import uvloop
    except ImportError:
        return asyncio.new_event_loop()
    return uvloop.new_event_loop()


def side_by_side(
    timers: dict[str, Callable[[int], list[float]]], requests: int, rounds: int
) -> dict[str, np.ndarray]:
    """Run every timer `requests` times in total, in `rounds` rounds whose order alternates."""
    times: dict[str, list[float]] = {name: [] for name in timers}
    names = list(timers)
    per_round = max(1, requests // rounds)
    for r in range(rounds):
        for name in names if r % 2 == 0 else names[::-1]:
            times[name] += timers[name](per_round)
    return {name: np.asarray(t) * 1000 for name, t in times.items()}


def report(title: str, ms: dict[str, np.ndarray]) -> float:
    print(f"  {title}")
    for name, values in ms.items():
        p50, p99 = np.percentile(values, [50, 99])
        print(f"    {name:<24} p50 {p50:6.3f} ms   p99 {p99:6.3f} ms   ({len(values)} requests)")
    ratio = float(np.median(ms["GET /api/me"]) / np.median(ms["bare FastAPI route"]))
    print(f"    ratio of medians, /api/me over bare route: {ratio:.2f}x (target <= 1.5x)")
    return ratio


def measure(url: str, backend: str, data_dir: Path, requests: int, rounds: int) -> None:
    from expertloop.config import Settings
    from expertloop.main import create_app
    from tests.serving import server_process

    token = prepare(url)
    auth = {"Authorization": f"Bearer {token}"}
    print(f"{backend}: load average {os.getloadavg()[0]:.2f} before the run")
    with (
        server_process(url, data_dir / "server") as ours,
        server_process(
            url, data_dir / "bare", app="request_overhead:bare", app_dir=ROOT / "bench"
        ) as baseline,
    ):
        ms = side_by_side(
            {
                "bare FastAPI route": http_timer(baseline.url, "/bare", {}),
                "GET /api/me": http_timer(ours.url, "/api/me", auth),
                "GET /healthz": http_timer(ours.url, "/healthz", {}),
            },
            requests,
            rounds,
        )
        report("over HTTP, http.client (uvicorn, one worker each, kept-alive connection)", ms)
        ms = side_by_side(
            {
                "bare FastAPI route": httpx_timer(baseline.url, "/bare", {}),
                "GET /api/me": httpx_timer(ours.url, "/api/me", auth),
                "GET /healthz": httpx_timer(ours.url, "/healthz", {}),
            },
            requests,
            rounds,
        )
        report("over HTTP, httpx (the same servers)", ms)

    settings = Settings(data_dir=data_dir / "inproc", database_url=url, job_mode="off")
    app = create_app(settings)
    loop = new_event_loop()
    try:
        ms = side_by_side(
            {
                "bare FastAPI route": asgi_timer(bare, "/bare", {}, loop),
                "GET /api/me": asgi_timer(app, "/api/me", auth, loop),
                "GET /healthz": asgi_timer(app, "/healthz", {}, loop),
            },
            requests,
            rounds,
        )
    finally:
        loop.run_until_complete(app.state.access_version.close())
        loop.close()
        app.state.engine.dispose()
    report("in process (ASGI call, no server)", ms)
    print(f"{backend}: load average {os.getloadavg()[0]:.2f} after the run")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--postgres", help="PostgreSQL URL; that database is emptied")
    parser.add_argument("--requests", type=int, default=5000, help="per route and way")
    parser.add_argument("--rounds", type=int, default=50, help="alternating rounds")
    args = parser.parse_args()
    print(f"request overhead: {os.cpu_count()} CPUs, one client, requests one after another")
    with tempfile.TemporaryDirectory() as tmp:
        data_dir = Path(tmp)
        measure(
            f"sqlite:///{data_dir / 'bench.db'}", "SQLite", data_dir, args.requests, args.rounds
        )
        if args.postgres:
            measure(args.postgres, "PostgreSQL", data_dir / "pg", args.requests, args.rounds)


if __name__ == "__main__":
    main()
