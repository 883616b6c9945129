"""The `expertloop` command: serve, db, loops, rounds, users, tokens, upload, rank, snapshots,
export."""

from __future__ import annotations

import json
import os
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer
from pydantic import ValidationError

from .config import get_settings

if TYPE_CHECKING:
    from sqlalchemy.orm import Session

    from .auth.models import User
    from .client import Client

cli = typer.Typer(
    help="expertloop: expert relabelling rounds for imitation-learned policies.",
    no_args_is_help=True,
    add_completion=False,
)
db_cli = typer.Typer(help="Database schema.", no_args_is_help=True)
loops_cli = typer.Typer(help="Loops (one per robot skill).", no_args_is_help=True)
users_cli = typer.Typer(help="Users and roles.", no_args_is_help=True)
tokens_cli = typer.Typer(help="API tokens.", no_args_is_help=True)
logs_cli = typer.Typer(help="Robot logs (ROS bags).", no_args_is_help=True)
rounds_cli = typer.Typer(help="Rounds of a loop (over HTTP).", no_args_is_help=True)
snapshots_cli = typer.Typer(help="Training-set versions (over HTTP).", no_args_is_help=True)
cli.add_typer(db_cli, name="db")
cli.add_typer(loops_cli, name="loops")
cli.add_typer(rounds_cli, name="rounds")
cli.add_typer(snapshots_cli, name="snapshots")
cli.add_typer(users_cli, name="users")
cli.add_typer(tokens_cli, name="tokens")
cli.add_typer(logs_cli, name="logs")

# Read by `users add --password` when set, so scripts need no prompt.
NEW_PASSWORD_ENV = "EXPERTLOOP_NEW_PASSWORD"

URL_OPTION = typer.Option(envvar="EXPERTLOOP_URL", help="Service URL.")
TOKEN_OPTION = typer.Option(envvar="EXPERTLOOP_TOKEN", help="API token.")


def _session():  # type: ignore[no-untyped-def]
    from .db import make_engine, make_session_factory

    engine = make_engine(get_settings().resolved_database_url)
    return make_session_factory(engine)()


def _fail(message: str) -> None:
    typer.secho(message, fg=typer.colors.RED, err=True)
    raise typer.Exit(code=2)


def _over_http(url: str, token: str, request: Callable[[Client], Any]) -> Any:
    """The answer of one API request, or exit with the service's refusal in words."""
    from .client import ApiError, Client

    with Client(url, token) as client:
        try:
            return request(client)
        except ApiError as exc:
            _fail(f"refused: {exc.detail}")


@db_cli.command("upgrade")
def db_upgrade() -> None:
    """Bring the database schema to the newest migration."""
    from .db import make_engine
    from .migrations_state import current_and_head, upgrade

    url = get_settings().resolved_database_url
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            before, head = current_and_head(connection)
        if before == head:
            typer.echo(f"already at revision {head} (the newest); nothing to do")
            return
        upgrade(url)
        with engine.connect() as connection:
            after, _ = current_and_head(connection)
    finally:
        engine.dispose()
    if before is None:
        typer.echo(f"created the database schema at revision {after} (the database was empty)")
    else:
        typer.echo(f"upgraded the database schema from revision {before} to {after}")


@cli.command()
def serve(
    host: Annotated[str, typer.Option(help="Address to bind (loopback by default).")] = "127.0.0.1",
    port: Annotated[int, typer.Option()] = 8000,
    workers: Annotated[int, typer.Option(help="Server processes.")] = 1,
    demo: Annotated[
        bool, typer.Option(help="Load the invented demo loop and users first.")
    ] = False,
) -> None:
    """Run the web service (migrating the database first)."""
    import uvicorn

    from .migrations_state import upgrade
    from .system.logs import configure_logging, logging_config

    settings = get_settings()
    configure_logging(settings.log_format)
    upgrade(settings.resolved_database_url)
    if demo:
        from .demo.setup import prepare_demo

        typer.echo(prepare_demo(host=host, port=port))
    # uvicorn applies the dictionary in each server process (also with --workers > 1)
    uvicorn.run(
        "expertloop.asgi:app",
        host=host,
        port=port,
        workers=workers,
        log_level="info",
        log_config=logging_config(settings.log_format),
    )


@cli.command()
def worker() -> None:
    """Run background jobs (rankings) until interrupted; for team deployments."""
    import logging
    import signal
    import threading

    from .db import make_engine, make_session_factory
    from .job_handlers import register_job_handlers
    from .jobs.runner import run_until_stopped, worker_name
    from .shared.allocator import use_system_allocator
    from .system.logs import configure_logging

    use_system_allocator()  # as the server does (app.shared.allocator)
    settings = get_settings()
    configure_logging(settings.log_format)
    log = logging.getLogger("expertloop.worker")
    factory = make_session_factory(make_engine(settings.resolved_database_url))
    register_job_handlers()
    stop = threading.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, lambda *_: stop.set())
    log.info(
        "worker %s running (job lease %g s); Ctrl-C to stop",
        worker_name(),
        settings.job_lease_seconds,
    )
    run_until_stopped(factory, settings, stop)
    log.info("worker stopped")


@loops_cli.command("create")
def loops_create(spec_file: Path) -> None:
    """Create a loop from a JSON spec file."""
    from .loops import service
    from .loops.schemas import LoopCreate

    try:
        spec = LoopCreate.model_validate(json.loads(spec_file.read_text()))
    except (OSError, json.JSONDecodeError) as exc:
        _fail(f"cannot read {spec_file}: {exc}")
        return
    except ValidationError as exc:
        from .loops.spec_errors import plain_problems

        problems = "\n".join(f"  {line}" for line in plain_problems(exc))
        _fail(f"{spec_file} is not a valid loop spec:\n{problems}")
        return
    with _session() as session:
        loop = service.create_loop(session, spec=spec, user_id=None)
        session.commit()
        typer.echo(f"created loop '{loop.slug}' with round 0 open for demonstrations")


@loops_cli.command("list")
def loops_list() -> None:
    """List loops."""
    from .loops import service
    from .loops.spec import spec_of

    with _session() as session:
        for loop in service.list_loops(session):
            spec = spec_of(loop)
            typer.echo(f"{loop.slug}\t{spec.kind}\t{spec.n_features} features\t{loop.title}")


@loops_cli.command("log-mapping")
def loops_log_mapping(
    slug: str,
    mapping_file: Annotated[
        Path, typer.Argument(help="JSON: the mapping, or a loop spec with a log_mapping.")
    ],
    url: Annotated[str, URL_OPTION] = "http://127.0.0.1:8000",
    token: Annotated[str, TOKEN_OPTION] = "",
) -> None:
    """Set or replace a loop's log mapping over HTTP (admin token); robot logs uploaded from
    then on are read through it."""
    try:
        document = json.loads(mapping_file.read_text())
    except (OSError, json.JSONDecodeError) as exc:
        _fail(f"cannot read {mapping_file}: {exc}")
        return
    # a loop spec file carries the mapping under its own key; a mapping file is the mapping
    spec_file = isinstance(document, dict) and "log_mapping" in document
    mapping = document["log_mapping"] if spec_file else document
    loop = _over_http(url, token, lambda client: client.set_log_mapping(slug, mapping))
    set_to = loop["log_mapping"]
    topics = len({s["topic"] for s in set_to["features"].values()})
    typer.echo(
        f"log mapping of '{slug}' set: {len(set_to['features'])} features from {topics} "
        f"topics at {set_to['step_rate_hz']:g} steps a second; robot logs uploaded from now "
        "on are read through it"
    )


@users_cli.command("add")
def users_add(
    name: str,
    role: Annotated[list[str], typer.Option(help="admin, uploader, annotator or trainer.")],
    password: Annotated[bool, typer.Option(help="Ask for a browser password.")] = False,
    token: Annotated[bool, typer.Option(help="Print a one-time API token.")] = True,
) -> None:
    """Create a user with roles; prints an API token once and/or sets a password."""
    from .auth import service
    from .errors import ExpertloopError

    secret = None
    if password:
        secret = os.environ.get(NEW_PASSWORD_ENV) or typer.prompt(
            "password", hide_input=True, confirmation_prompt=True
        )
    with _session() as session:
        try:
            user = service.create_user(session, name=name, roles=role, password=secret)
        except ExpertloopError as exc:
            _fail(exc.message)
            return
        issued = service.issue_token(session, user=user) if token else None
        session.commit()
        typer.echo(f"created user '{user.name}' with roles {', '.join(user.roles)}")
        if issued:
            typer.echo(f"API token (shown once): {issued}")


@users_cli.command("list")
def users_list() -> None:
    """List users and their roles."""
    from .auth import service

    with _session() as session:
        for user in service.list_users(session):
            has_password = "password" if user.password_hash else "no password"
            inactive = "" if user.active else "\tdeactivated"
            typer.echo(f"{user.name}\t{','.join(user.roles)}\t{has_password}{inactive}")


def _change_user(name: str, change: Callable[[Session, User], str]) -> None:
    from .auth import service
    from .errors import ExpertloopError

    with _session() as session:
        try:
            user = service.get_user_by_name(session, name=name)
            said = change(session, user)
        except ExpertloopError as exc:
            _fail(exc.message)
            return
        session.commit()
    typer.echo(said)


@users_cli.command("role")
def users_role(
    name: str,
    role: Annotated[list[str], typer.Option(help="admin, uploader, annotator or trainer.")],
) -> None:
    """Replace a user's roles with the ones given (repeat --role for several)."""
    from .auth import service

    def change(session: Session, user: User) -> str:
        before = ", ".join(user.roles)
        service.set_roles(session, user=user, roles=role)
        return f"user '{user.name}': roles {before} -> {', '.join(user.roles)}"

    _change_user(name, change)


def _set_active(name: str, *, active: bool, done: str) -> None:
    from .auth import service

    def change(session: Session, user: User) -> str:
        service.set_active(session, user=user, active=active)
        return f"user '{user.name}' {done}"

    _change_user(name, change)


@users_cli.command("deactivate")
def users_deactivate(name: str) -> None:
    """Stop a user's tokens and browser sessions at once; their labels and records stay."""
    _set_active(name, active=False, done="deactivated: tokens and sign-in refused from now on")


@users_cli.command("activate")
def users_activate(name: str) -> None:
    """Let a deactivated user sign in and use their tokens again."""
    _set_active(name, active=True, done="active again")


@tokens_cli.command("issue")
def tokens_issue(name: str) -> None:
    """Print a new API token for an existing user (shown once)."""
    from .auth import service
    from .errors import ExpertloopError

    with _session() as session:
        try:
            user = service.get_user_by_name(session, name=name)
        except ExpertloopError as exc:
            _fail(exc.message)
            return
        issued = service.issue_token(session, user=user)
        session.commit()
        typer.echo(f"API token (shown once): {issued}")


@tokens_cli.command("revoke")
def tokens_revoke(
    prefix: Annotated[str, typer.Argument(help="The token or its first 10 characters.")],
) -> None:
    """Revoke an API token."""
    from .auth import service
    from .errors import ExpertloopError

    with _session() as session:
        try:
            count = service.revoke_token(session, prefix=prefix)
            session.commit()
        except ExpertloopError as exc:
            _fail(exc.message)
            return
    if count == 0:
        _fail("no live token starts with that prefix")
    typer.echo(f"revoked {count} token(s)")


@cli.command()
def upload(
    file: Path,
    loop: Annotated[str, typer.Option(help="Loop slug.")],
    round_number: Annotated[int, typer.Option("--round", help="Round number.")],
    url: Annotated[str, URL_OPTION] = "http://127.0.0.1:8000",
    token: Annotated[str, TOKEN_OPTION] = "",
) -> None:
    """Upload a rollout file (Parquet, .npz, JSON Lines) or robot log (.mcap, .bag, ROS 2 bag
    folder as .zip or .tar) with a progress bar."""
    from tqdm import tqdm

    from .client import ApiError, Client

    if not file.exists():
        _fail(f"no such file: {file}")
    with Client(url, token) as client:
        # a cheap GET first, so a wrong loop or round is refused before the file travels
        try:
            rounds = {r["number"]: r for r in client.rounds(loop)}
        except ApiError as exc:
            _fail(f"refused before sending the file: {exc.detail}")
            return
        if round_number not in rounds:
            _fail(
                f"refused before sending the file: loop '{loop}' has no round {round_number} "
                f"(rounds: {', '.join(str(n) for n in sorted(rounds))}); open one with "
                f"`expertloop rounds open --loop {loop} --learner-version V`"
            )
        if rounds[round_number]["status"] != "open":
            _fail(
                f"refused before sending the file: round {round_number} of '{loop}' is "
                f"{rounds[round_number]['status']} and takes no uploads"
            )
    with (
        Client(url, token) as client,
        tqdm(total=file.stat().st_size, unit="B", unit_scale=True, desc=file.name) as bar,
    ):
        try:
            result = client.upload(loop, round_number, file, progress=lambda n: bar.update(n))
        except ApiError as exc:
            bar.close()
            _fail(f"refused: {exc.detail}")
            return
    note = (
        " (this file was uploaded before; nothing new stored)" if result["duplicate_file"] else ""
    )
    typer.echo(f"stored {len(result['rollouts'])} rollouts, {result['steps']} steps{note}")


@logs_cli.command("inspect")
def logs_inspect(
    file: Path,
    loop: Annotated[
        str | None, typer.Option(help="Loop slug: map the log with this loop's log mapping.")
    ] = None,
    spec: Annotated[
        Path | None, typer.Option(help="A loop spec file with a log_mapping (instead of --loop).")
    ] = None,
    round_number: Annotated[int, typer.Option("--round", help="Round the log is for.")] = 1,
    url: Annotated[str, URL_OPTION] = "http://127.0.0.1:8000",
    token: Annotated[str, TOKEN_OPTION] = "",
) -> None:
    """Dry run: list a log's topics, rates and types, and what the loop's log mapping makes of
    it (steps, rollouts, missing values), here on this machine, storing nothing."""
    import tempfile

    from .client import ApiError, Client
    from .errors import ExpertloopError
    from .ingest.logs.inspect import inspect_log, report_lines

    if not file.exists():
        _fail(f"no such file: {file}")
    loop_spec = None
    if spec is not None:
        try:
            loop_spec = json.loads(spec.read_text())
        except (OSError, json.JSONDecodeError) as exc:
            _fail(f"cannot read {spec}: {exc}")
    elif loop is not None:
        with Client(url, token) as client:
            try:
                loop_spec = client.loop(loop)
            except (ApiError, OSError) as exc:
                _fail(f"cannot fetch loop '{loop}' from {url}: {exc}")
    with tempfile.TemporaryDirectory() as spool:
        try:
            found = inspect_log(
                file, loop=loop_spec, round_number=round_number, spool_dir=Path(spool)
            )
        except ExpertloopError as exc:
            _fail(exc.message)
            return
    for line in report_lines(found, loop_slug=loop):
        typer.echo(line)


@cli.command()
def rank(
    loop: Annotated[str, typer.Option(help="Loop slug.")],
    round_number: Annotated[int, typer.Option("--round", help="Round number.")],
    budget: Annotated[int, typer.Option(help="Labels to ask for.")],
    seed: Annotated[int | None, typer.Option(help="Audit sample seed (random if omitted).")] = None,
    url: Annotated[str, URL_OPTION] = "http://127.0.0.1:8000",
    token: Annotated[str, TOKEN_OPTION] = "",
) -> None:
    """Rank a round's states in the background and fill its queue, with a progress bar."""
    import time

    from tqdm import tqdm

    from .client import ApiError, Client

    with Client(url, token) as client:
        try:
            job = client.request(
                "POST",
                f"/api/loops/{loop}/rounds/{round_number}/ranking",
                json={"budget": budget, "seed": seed},
            )["job"]
        except ApiError as exc:
            _fail(f"refused: {exc.detail}")
            return
        with tqdm(total=100, desc=f"ranking round {round_number}", unit="%") as bar:
            while job["status"] in ("queued", "running"):
                time.sleep(0.5)
                job = client.request("GET", f"/api/jobs/{job['id']}")
                bar.update(round(job["progress"] * 100) - bar.n)
    if job["status"] == "failed":
        _fail(f"ranking failed: {job['message']}")
    result = job["result"]
    typer.echo(
        f"chose {result['chosen']} states ({result['audit']} audit) of {result['candidates']} "
        f"candidates against {result['training_states']} training states; "
        f"uncertainty: {result['uncertainty_method']}"
    )
    for note in result["notes"]:
        typer.echo(f"note: {note}")


@rounds_cli.command("open")
def rounds_open(
    loop: Annotated[str, typer.Option(help="Loop slug.")],
    learner_version: Annotated[str, typer.Option(help="The learner version that ran it.")],
    url: Annotated[str, URL_OPTION] = "http://127.0.0.1:8000",
    token: Annotated[str, TOKEN_OPTION] = "",
) -> None:
    """Open the loop's next round for a learner version (admin token)."""
    opened = _over_http(url, token, lambda client: client.open_round(loop, learner_version))
    typer.echo(f"opened round {opened['number']} of '{loop}' for learner {learner_version}")


@rounds_cli.command("close")
def rounds_close(
    loop: Annotated[str, typer.Option(help="Loop slug.")],
    round_number: Annotated[int, typer.Option("--round", help="Round number.")],
    url: Annotated[str, URL_OPTION] = "http://127.0.0.1:8000",
    token: Annotated[str, TOKEN_OPTION] = "",
) -> None:
    """Close a round: it takes no more uploads (admin token)."""
    _over_http(url, token, lambda client: client.close_round(loop, round_number))
    typer.echo(f"closed round {round_number} of '{loop}'; it takes no more uploads")


@rounds_cli.command("list")
def rounds_list(
    loop: Annotated[str, typer.Option(help="Loop slug.")],
    url: Annotated[str, URL_OPTION] = "http://127.0.0.1:8000",
    token: Annotated[str, TOKEN_OPTION] = "",
) -> None:
    """List a loop's rounds: number, status, learner version, rollouts, steps."""
    for r in _over_http(url, token, lambda client: client.rounds(loop)):
        typer.echo(
            f"{r['number']}\t{r['status']}\t{r['learner_version'] or '-'}\t"
            f"{r['rollouts']} rollouts\t{r['steps']} steps"
        )


@snapshots_cli.command("create")
def snapshots_create(
    loop: Annotated[str, typer.Option(help="Loop slug.")],
    up_to_round: Annotated[
        int | None, typer.Option(help="Last round included (default: the newest).")
    ] = None,
    url: Annotated[str, URL_OPTION] = "http://127.0.0.1:8000",
    token: Annotated[str, TOKEN_OPTION] = "",
) -> None:
    """Make the next training-set version, or name the existing one with the same content."""
    made = _over_http(url, token, lambda client: client.create_snapshot(loop, up_to_round))
    what = "created" if made["created"] else "unchanged, the same content is already"
    typer.echo(
        f"{what} {made['version']} of '{loop}': {made['row_count']} rows up to round "
        f"{made['up_to_round']}, content sha256 {made['content_sha256']}"
    )


@snapshots_cli.command("list")
def snapshots_list(
    loop: Annotated[str, typer.Option(help="Loop slug.")],
    url: Annotated[str, URL_OPTION] = "http://127.0.0.1:8000",
    token: Annotated[str, TOKEN_OPTION] = "",
) -> None:
    """List a loop's training-set versions: version, rounds, rows, created, content hash."""
    for v in _over_http(url, token, lambda client: client.snapshots(loop)):
        typer.echo(
            f"{v['version']}\tup to round {v['up_to_round']}\t{v['row_count']} rows\t"
            f"{v['created_at']}\t{v['content_sha256'][:16]}"
        )


@cli.command("demo-run")
def demo_run(
    rounds: Annotated[int, typer.Option(help="DAgger rounds after the demonstrations.")] = 3,
    budget: Annotated[int, typer.Option(help="Labels asked for per round.")] = 100,
    selection: Annotated[str, typer.Option(help="ranked or uniform.")] = "ranked",
    seed: Annotated[int, typer.Option()] = 0,
    actions: Annotated[str, typer.Option(help="discrete or continuous.")] = "discrete",
    url: Annotated[
        str | None, typer.Option(help="Use a running server (default: start one).")
    ] = None,
    token: Annotated[str, TOKEN_OPTION] = "",
    plot: Annotated[Path, typer.Option(help="Where to write the SVG plot.")] = Path("demo-run.svg"),
) -> None:
    """Run the invented demo loop end to end through the HTTP API and print a per-round table."""
    import tempfile

    from .client import Client
    from .config import Settings

    try:
        from .demo import loop_run
    except ModuleNotFoundError as exc:  # the demo learner's library comes with the demo extra
        if exc.name != "sklearn":
            raise
        _fail("demo-run trains the demo learner with scikit-learn: pip install 'expertloop[demo]'")
    from .demo.local_server import local_server
    from .demo.plot import write_plot

    if selection not in ("ranked", "uniform") or actions not in ("discrete", "continuous"):
        _fail("--selection is ranked or uniform; --actions is discrete or continuous")
    typer.echo(
        f"invented demo: {actions} actions, {selection} selection, budget {budget}, seed {seed}"
    )
    typer.echo(loop_run.TABLE_HEADER)

    def go(admin: Client, annotator: Client) -> list[loop_run.RoundRow]:
        return loop_run.run(
            admin,
            annotator,
            kind=actions,
            rounds=rounds,
            budget=budget,
            selection=selection,
            seed=seed,
            report=lambda row: typer.echo(loop_run.format_row(row)),
        )

    if url:
        with Client(url, token) as client:
            rows = go(client, client)
    else:
        with tempfile.TemporaryDirectory() as tmp:
            settings = Settings(data_dir=Path(tmp), job_mode="thread")
            with (
                local_server(settings) as server,
                Client(server.url, server.admin_token) as admin,
                Client(server.url, server.annotator_token) as annotator,
            ):
                rows = go(admin, annotator)
    write_plot(rows, plot, title=f"Invented demo, {actions} actions, {selection} selection")
    typer.echo(f"plot written to {plot}")


@cli.command()
def export(
    loop: Annotated[str, typer.Option(help="Loop slug.")],
    version: Annotated[str, typer.Option(help="Snapshot version: vN or latest.")] = "latest",
    file_format: Annotated[
        str, typer.Option("--format", help="parquet, npz or jsonl.")
    ] = "parquet",
    out: Annotated[
        Path | None, typer.Option(help="Output file (default: LOOP-vN.FORMAT here).")
    ] = None,
    since: Annotated[
        str | None,
        typer.Option(
            help="Only rows not identical in this earlier version (vN); the default name is "
            "then LOOP-vN-since-vM.FORMAT."
        ),
    ] = None,
    url: Annotated[str, URL_OPTION] = "http://127.0.0.1:8000",
    token: Annotated[str, TOKEN_OPTION] = "",
) -> None:
    """Download a snapshot (training-set version) with a progress bar."""
    from tqdm import tqdm

    from .client import ApiError, Client
    from .snapshots.names import download_name

    # "latest" is resolved to its number once, so the name and the rows agree; an incremental
    # export is named as one, never like the full version it would otherwise overwrite
    version = _over_http(url, token, lambda client: client.snapshot(loop, version))["version"]
    if since is not None:
        earlier = since
        since = _over_http(url, token, lambda client: client.snapshot(loop, earlier))["version"]
    target = out or Path(
        download_name(
            loop, int(version[1:]), None if since is None else int(since[1:]), file_format
        )
    )
    with (
        Client(url, token) as client,
        tqdm(unit="B", unit_scale=True, desc=target.name) as bar,
    ):
        try:
            headers = client.export(
                loop,
                target,
                version=version,
                file_format=file_format,
                since=since,
                progress=lambda n: bar.update(n),
                size=lambda total: setattr(bar, "total", total),
            )
        except ApiError as exc:
            bar.close()
            _fail(f"refused: {exc.detail}")
            return
    rows = headers.get("x-expertloop-rows")
    what = f"{rows} rows" if rows else f"rows not identical in {since}"
    typer.echo(
        f"wrote {target}: {headers.get('x-expertloop-version')} of '{loop}', {what}, "
        f"content sha256 {headers.get('x-expertloop-content-sha256')}"
    )


def main() -> None:
    """Entry point of the `expertloop` console script."""
    cli()
