"""The identity cache (app/auth/cache.py): answers are reused, and every change of users, tokens
or browser sessions, made anywhere, counts from the next request of every app instance."""

from __future__ import annotations

import asyncio
import threading
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import text, update
from typer.testing import CliRunner

from expertloop.auth import access_version, changes, identify, service
from expertloop.auth.cache import Identity, IdentityCache, Known
from expertloop.auth.changes import FRESH_S
from expertloop.auth.identify import SESSION_COOKIE
from expertloop.auth.models import WATCHED_TABLES, BrowserSession
from expertloop.cli import cli
from expertloop.config import Settings, get_settings
from expertloop.main import create_app
from expertloop.models import utcnow
from tests.conftest import PG_URL
from tests.helpers import sign_in_form
from tests.serving import server_process

runner = CliRunner()


@pytest.fixture
def other(settings: Settings) -> Iterator[TestClient]:
    """A second app instance on the same store: another process, as far as caches go."""
    with TestClient(create_app(settings)) as client:
        yield client


@pytest.fixture
def cli_env(database_url: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    monkeypatch.setenv("EXPERTLOOP_DATABASE_URL", database_url)
    monkeypatch.setenv("EXPERTLOOP_DATA_DIR", str(tmp_path / "cli"))
    get_settings.cache_clear()
    yield
    get_settings.cache_clear()


def cli_ok(*args: str) -> str:
    result = runner.invoke(cli, list(args))
    assert result.exit_code == 0, result.output
    return result.output


@pytest.fixture
def store_reads(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """The kind of every identity lookup that went to the store (cache misses)."""
    seen: list[str] = []
    real = identify._read

    def counted(factory: Any, cache: IdentityCache, kind: str, secret: str) -> Known | None:
        seen.append(kind)
        return real(factory, cache, kind, secret)

    monkeypatch.setattr(identify, "_read", counted)
    return seen


def version(engine: Any) -> int:
    with engine.connect() as conn:
        return access_version.read(conn)


# --- the counter -------------------------------------------------------------------------------

CHANGES = {
    "role change": "UPDATE users SET roles = '[\"trainer\"]' WHERE name = 'ann'",
    "deactivation": "UPDATE users SET active = false WHERE name = 'ann'",
    "user deleted": "DELETE FROM users WHERE name = 'ann'",
    "token revoked": "UPDATE api_tokens SET revoked_at = CURRENT_TIMESTAMP",
    "token deleted": "DELETE FROM api_tokens",
    "session ended": "UPDATE browser_sessions SET ended_at = CURRENT_TIMESTAMP",
    "session deleted": "DELETE FROM browser_sessions",
}


def test_the_changes_below_cover_every_watched_table():
    touched = {word for sql in CHANGES.values() for word in sql.split() if word in WATCHED_TABLES}
    assert touched == set(WATCHED_TABLES)


@pytest.mark.parametrize("change", sorted(CHANGES))
def test_every_change_of_users_tokens_or_sessions_bumps_the_version(
    change, client, make_user, engine
):
    # typed as an operator would, bypassing the service: the triggers still see it
    make_user("annotator", name="ann", password="correct horse")
    sign_in_form(client, "ann", "correct horse", "/")
    before = version(engine)
    with engine.begin() as conn:
        conn.execute(text(CHANGES[change]))
    assert version(engine) > before


def test_new_users_tokens_and_sessions_leave_the_version_alone(client, make_user, engine):
    # nothing cached can go stale by a row being added: only live credentials are cached
    before = version(engine)
    make_user("annotator", name="ann", password="correct horse")
    sign_in_form(client, "ann", "correct horse", "/")
    assert version(engine) == before


def test_a_store_without_the_row_reads_zero_and_the_next_change_restores_it(make_user, engine, app):
    with engine.begin() as conn:
        conn.execute(text("DELETE FROM access_version"))
    assert version(engine) == 0
    header = make_user("annotator", name="ann")
    with app.state.session_factory.begin() as session:
        service.revoke_token(session, prefix=header["Authorization"].split()[1][:10])
    assert version(engine) == 1


# --- the cache ---------------------------------------------------------------------------------


def test_answers_are_reused_while_nothing_changes(client, make_user, store_reads):
    header = make_user("annotator", name="ann")
    for _ in range(5):
        assert client.get("/api/me", headers=header).json() == {
            "name": "ann",
            "roles": ["annotator"],
        }
    assert store_reads == ["token"]


def test_unknown_tokens_are_never_cached(client, app, store_reads):
    for i in range(20):
        bad = {"Authorization": f"Bearer el_guess{i}"}
        assert client.get("/api/me", headers=bad).status_code == 401
    assert len(app.state.identity_cache) == 0 and len(store_reads) == 20


def test_a_revoked_token_is_refused_on_the_very_next_request_everywhere(
    client, other, make_user, store_reads, cli_env
):
    header = make_user("annotator", name="ann")
    for c in (client, other, client, other):
        assert c.get("/api/me", headers=header).status_code == 200
    assert store_reads == ["token", "token"]  # one lookup per app instance
    cli_ok("tokens", "revoke", header["Authorization"].split()[1][:10])
    for c in (other, client):
        refused = c.get("/api/me", headers=header)
        assert refused.status_code == 401 and "API token" in refused.json()["detail"]


def test_a_token_revoked_through_the_service_is_refused_at_once(client, other, make_user, app):
    header = make_user("annotator", name="ann")
    assert other.get("/api/me", headers=header).status_code == 200
    with app.state.session_factory.begin() as session:
        assert service.revoke_token(session, prefix=header["Authorization"].split()[1]) == 1
    assert other.get("/api/me", headers=header).status_code == 401


def test_a_deactivated_user_is_refused_and_active_again_admitted(client, other, make_user, cli_env):
    header = make_user("annotator", name="ann")
    assert other.get("/api/me", headers=header).status_code == 200
    cli_ok("users", "deactivate", "ann")
    assert other.get("/api/me", headers=header).status_code == 401
    assert client.get("/api/me", headers=header).status_code == 401
    cli_ok("users", "activate", "ann")
    assert other.get("/api/me", headers=header).status_code == 200


def test_a_role_change_counts_from_the_next_request(client, other, make_user, cli_env):
    header = make_user("admin", "annotator", name="ann")
    assert other.get("/api/loops", headers=header).status_code == 200
    assert other.get("/api/me", headers=header).json()["roles"] == ["admin", "annotator"]
    cli_ok("users", "role", "ann", "--role", "annotator")
    assert other.get("/api/me", headers=header).json()["roles"] == ["annotator"]
    refused = other.get("/metrics", headers=header)  # admin only
    assert refused.status_code == 403 and "admin" in refused.json()["detail"]


def test_signing_out_in_one_instance_ends_the_session_in_every_other(
    client, other, make_user, settings
):
    make_user("annotator", name="ann", password="correct horse")
    assert sign_in_form(client, "ann", "correct horse", "/").status_code == 303
    cookie = client.cookies.get(SESSION_COOKIE)
    other.cookies.set(SESSION_COOKIE, cookie)
    assert other.get("/api/me").status_code == 200
    home = client.get("/")
    csrf = home.text.split('name="csrf_token" value="')[1].split('"')[0]
    assert client.post("/logout", data={"csrf_token": csrf}).status_code in (200, 303)
    assert other.get("/api/me").status_code == 401


def test_a_cached_session_still_needs_its_csrf_token(client, make_user, engine):
    from tests.helpers import DISCRETE_SPEC

    make_user("admin", name="boss", password="correct horse")
    sign_in_form(client, "boss", "correct horse", "/")
    assert client.get("/api/me").status_code == 200  # cached from here on
    refused = client.post("/api/loops", json=DISCRETE_SPEC, headers={"X-CSRF-Token": "nope"})
    assert refused.status_code == 403 and "CSRF" in refused.json()["detail"]


def test_a_cached_session_ends_when_it_expires(client, make_user, engine, store_reads):
    make_user("annotator", name="ann", password="correct horse")
    sign_in_form(client, "ann", "correct horse", "/")
    ends = utcnow().timestamp() + 1.0
    with engine.begin() as conn:
        conn.execute(
            update(BrowserSession).values(expires_at=utcnow().fromtimestamp(ends, utcnow().tzinfo))
        )
    assert client.get("/api/me").status_code == 200
    assert client.get("/api/me").status_code == 200
    reads = len(store_reads)
    time.sleep(max(0.0, ends - time.time()) + 0.05)
    assert client.get("/api/me").status_code == 401  # no change in the store: the clock did it
    assert len(store_reads) == reads + 1


def test_answers_older_than_the_time_limit_are_read_again(client, app, make_user, store_reads):
    now = [1000.0]
    app.state.identity_cache.clock = lambda: now[0]
    header = make_user("annotator", name="ann")
    client.get("/api/me", headers=header)
    now[0] += app.state.identity_cache.ttl_s - 0.5
    client.get("/api/me", headers=header)
    assert store_reads == ["token"]
    now[0] += 1.0
    client.get("/api/me", headers=header)
    assert store_reads == ["token", "token"]


def test_the_cache_is_bounded_and_drops_its_oldest_entry_first():
    cache = IdentityCache(max_entries=3, clock=lambda: 0.0)
    who = Identity(id=1, name="ann", roles=("annotator",))
    for key in "abcd":
        cache.put(key, Known(who, version=1, read_at=0.0))
    assert len(cache) == 3 and cache.get("a") is None and cache.get("d") is not None
    cache.put("b", Known(who, version=2, read_at=0.0))  # refreshed: now the newest
    cache.put("e", Known(who, version=2, read_at=0.0))
    assert cache.get("c") is None and cache.get("b") is not None


def test_when_the_fast_read_cannot_answer_every_request_reads_the_store(
    client, app, make_user, store_reads, cli_env
):
    class Unavailable:
        async def current(self) -> None:
            return None

        async def close(self) -> None:
            pass

    app.state.access_version = Unavailable()
    header = make_user("annotator", name="ann")
    for _ in range(3):
        assert client.get("/api/me", headers=header).status_code == 200
    assert store_reads == ["token"] * 3
    cli_ok("tokens", "revoke", header["Authorization"].split()[1][:10])
    assert client.get("/api/me", headers=header).status_code == 401


@pytest.mark.skipif(not PG_URL, reason="the reader's own connection is PostgreSQL's")
def test_a_dropped_reader_connection_falls_back_and_reconnects(
    client, app, make_user, engine, store_reads
):
    header = make_user("annotator", name="ann")
    for _ in range(2):
        assert client.get("/api/me", headers=header).status_code == 200
    assert store_reads == ["token"]
    readers = (  # of this database only: other databases of the cluster have readers too
        "SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
        "WHERE application_name = :name AND datname = current_database()"
    )
    with engine.connect() as conn:
        killed = conn.execute(text(readers), {"name": access_version.APPLICATION_NAME}).all()
    assert killed == [(True,)]
    time.sleep(FRESH_S)  # past the last read's reuse
    assert client.get("/api/me", headers=header).status_code == 200  # the slow path answered
    assert store_reads == ["token", "token"]
    time.sleep(access_version.RETRY_AFTER_S + 0.1)
    for _ in range(2):
        assert client.get("/api/me", headers=header).status_code == 200
    assert store_reads == ["token", "token"]  # answered from the cache again
    with engine.connect() as conn:  # by a new connection of the reader's
        again = conn.execute(text(readers), {"name": access_version.APPLICATION_NAME}).all()
    assert again == [(True,)]


def test_reads_are_shared_by_requests_within_the_reuse_time(engine, app):
    reader = access_version.make_reader(engine)
    reads: list[int | None] = []
    real: Any = reader._read  # type: ignore[attr-defined]

    if isinstance(reader, access_version.PostgresReader):

        async def counted(loop: Any) -> int | None:
            reads.append(await real(loop))
            return reads[-1]

        reader._read = counted  # type: ignore[method-assign]
    else:

        def counted_now() -> int | None:  # SQLite reads on the loop, without awaiting
            reads.append(real())
            return reads[-1]

        reader._read = counted_now  # type: ignore[attr-defined]

    async def together() -> list[int | None]:
        return list(await asyncio.gather(*(reader.current() for _ in range(20))))

    async def run() -> tuple[list[int | None], list[int | None], int | None]:
        first = await together()  # one read for twenty requests at once
        await asyncio.sleep(FRESH_S * 1.5)
        second = await together()  # the first is too old now: one more
        with app.state.session_factory.begin() as session:  # a change: it waits out reuse
            service.set_active(
                session,
                user=service.create_user(session, name="ann", roles=["annotator"]),
                active=False,
            )
        after = await reader.current()
        await reader.close()
        return first, second, after

    first, second, after = asyncio.run(run())
    assert len(reads) == 3 and first == [first[0]] * 20 and second == [first[0]] * 20
    assert after is not None and first[0] is not None and after > first[0]


def test_a_change_returns_only_once_no_process_can_answer_from_before_it(
    client, other, make_user, app, engine
):
    header = make_user("annotator", name="ann")
    assert other.get("/api/me", headers=header).status_code == 200
    with app.state.session_factory() as session:
        assert service.revoke_token(session, prefix=header["Authorization"].split()[1]) == 1
        assert other.get("/api/me", headers=header).status_code == 200  # not committed yet
        began = time.monotonic()
        session.commit()
        waited = time.monotonic() - began
    # the other instance read the version a moment ago; had the commit not waited, the request
    # below could take that read and the cached identity with it
    assert waited >= FRESH_S
    assert other.get("/api/me", headers=header).status_code == 401


def test_sql_typed_by_hand_counts_within_the_reuse_time(client, other, make_user, engine):
    header = make_user("annotator", name="ann")
    assert other.get("/api/me", headers=header).status_code == 200
    with engine.begin() as conn:  # no session: nothing waits
        conn.execute(text("UPDATE api_tokens SET revoked_at = CURRENT_TIMESTAMP"))
    time.sleep(FRESH_S)
    assert other.get("/api/me", headers=header).status_code == 401


def test_only_commits_that_changed_someones_access_wait(app, make_user, monkeypatch):
    header = make_user("annotator", name="ann")
    waits: list[float] = []
    monkeypatch.setattr(changes.time, "sleep", waits.append)
    with app.state.session_factory() as session:
        service.create_user(session, name="new", roles=["annotator"])
        session.commit()
        assert waits == []  # a new user, token or session changes no one's access
        service.revoke_token(session, prefix=header["Authorization"].split()[1])
        session.commit()
    assert waits == [FRESH_S]


# --- at the same time --------------------------------------------------------------------------


def test_concurrent_requests_across_instances_see_a_revocation_from_the_next_one_on(
    client, other, make_user, app
):
    kept = make_user("annotator", name="kept")
    gone = make_user("annotator", name="gone")
    clients = [(client, kept), (other, kept), (client, gone), (other, gone)] * 2
    answered: list[list[tuple[float, int]]] = [[] for _ in clients]
    stop = threading.Event()

    def hammer(i: int) -> None:
        c, header = clients[i]
        while not stop.is_set():
            started = time.monotonic()
            answered[i].append((started, c.get("/api/me", headers=header).status_code))

    def until_each_started(count: int, after: float) -> None:
        deadline = time.monotonic() + 60
        while any(sum(t > after for t, _ in answers) < count for answers in answered):
            assert time.monotonic() < deadline, "the requests stopped coming"
            time.sleep(0.02)

    with ThreadPoolExecutor(len(clients)) as pool:
        runs = [pool.submit(hammer, i) for i in range(len(clients))]
        until_each_started(3, after=0.0)  # every token cached in both instances
        with app.state.session_factory.begin() as session:
            assert service.revoke_token(session, prefix=gone["Authorization"].split()[1]) == 1
        revoked_at = time.monotonic()
        until_each_started(3, after=revoked_at)
        stop.set()
        for run in runs:
            run.result()
    for (_, header), answers in zip(clients, answered, strict=True):
        if header is kept:
            assert {status for _, status in answers} == {200}
        else:
            assert {status for t, status in answers if t < revoked_at} >= {200}
            assert {status for t, status in answers if t > revoked_at} == {401}, answers[-20:]


@pytest.mark.slow
def test_two_server_processes_refuse_a_token_revoked_by_the_cli_on_the_next_request(
    database_url, tmp_path, make_user, cli_env
):
    header = make_user("annotator", name="ann")
    with (
        server_process(database_url, tmp_path / "a") as first,
        server_process(database_url, tmp_path / "b") as second,
    ):
        servers = [httpx.Client(base_url=s.url, headers=header) for s in (first, second)]
        for c in servers * 3:
            assert c.get("/api/me").status_code == 200
        cli_ok("tokens", "revoke", header["Authorization"].split()[1][:10])
        assert [c.get("/api/me").status_code for c in servers] == [401, 401]
