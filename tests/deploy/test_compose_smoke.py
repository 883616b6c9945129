"""docker-compose.yml, started without a container engine: the services' own commands and
environments, run here as processes against a private PostgreSQL cluster.

Only what a container engine would change is changed: the host `postgres` in the database URL
becomes the test's cluster, the app's port a free loopback port, and the shared /data volume a
temporary folder that the app and the worker share as the compose file's `blobs` volume.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import httpx
import pytest
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy.engine import make_url

from expertloop.migrations_state import alembic_config
from tests.deploy.pgcluster import PgCluster, free_port
from tests.deploy.services import (
    Service,
    add_user,
    compose_services,
    process_env,
    run_command,
    stop_all,
    wait_for_http,
    wait_for_job,
)
from tests.helpers import DISCRETE_SPEC, discrete_rows, parquet_bytes

SLUG = DISCRETE_SPEC["slug"]


def _option(command: list[str], name: str) -> str:
    return command[command.index(name) + 1]


def _with_option(command: list[str], name: str, value: str) -> list[str]:
    out = list(command)
    out[out.index(name) + 1] = value
    return out


def _local_database(pg_cluster: PgCluster, compose_url: str) -> str:
    """Create the compose file's database and role on the cluster; return its local URL."""
    url = make_url(compose_url)
    assert url.host == "postgres", "the services reach the database by its compose service name"
    assert url.database and url.username
    pg_cluster.create_database(url.database, owner=url.username)
    local = url.set(host="127.0.0.1", port=pg_cluster.port)
    return local.render_as_string(hide_password=False)


def _metrics(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    values = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            values[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return values


def _head_revision() -> str:
    from alembic.script import ScriptDirectory

    head = ScriptDirectory.from_config(alembic_config("sqlite://")).get_current_head()
    assert head is not None
    return head


@pytest.mark.slow
def test_compose_services_run_a_round_end_to_end(
    pg_cluster: PgCluster, tmp_path: Path, log_dir: Path
) -> None:
    services = compose_services()
    for name in ("migrate", "app", "worker"):
        assert services[name]["environment"]["EXPERTLOOP_DATA_DIR"] == "/data"
    # the app and the worker share the blob volume at the data folder
    for name in ("app", "worker"):
        assert "blobs:/data" in services[name]["volumes"]
    environment: dict[str, Any] = services["app"]["environment"]
    assert environment["EXPERTLOOP_JOB_MODE"] == "worker"  # only workers run jobs
    database_url = _local_database(pg_cluster, environment["EXPERTLOOP_DATABASE_URL"])
    data_dir = tmp_path / "data"  # the `blobs` volume

    def env_of(name: str) -> dict[str, str]:
        return process_env(
            services[name]["environment"], database_url=database_url, data_dir=data_dir
        )

    # migrate: a one-shot service that must exit 0 (the others depend on its completion)
    assert services["app"]["depends_on"]["migrate"]["condition"] == (
        "service_completed_successfully"
    )
    migrate = run_command(services["migrate"]["command"], env_of("migrate"))
    assert migrate.returncode == 0, migrate.stderr
    assert "created the database schema at revision" in migrate.stdout  # a fresh cluster

    app_command: list[str] = services["app"]["command"]
    published = services["app"]["ports"][0].split(":")[-1]
    assert _option(app_command, "--port") == published  # the port the compose file publishes
    port = free_port()
    app_command = _with_option(app_command, "--port", str(port))
    app_command = _with_option(app_command, "--host", "127.0.0.1")  # loopback only, here
    app = Service("app", app_command, env_of("app"), log_dir)
    worker = Service("worker", services["worker"]["command"], env_of("worker"), log_dir)
    started = [app.start(), worker.start()]
    base = f"http://127.0.0.1:{port}"
    try:
        wait_for_http(base, app, timeout=90)
        client = httpx.Client(base_url=base, timeout=60)
        ready = client.get("/readyz")
        assert ready.status_code == 200
        assert ready.json() == {"status": "ready", "schema": _head_revision()}

        admin = add_user(env_of("app"), "alice", "admin")
        annotator = add_user(env_of("app"), "bob", "annotator")
        assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
        opened = client.post(
            f"/api/loops/{SLUG}/rounds", json={"learner_version": "v1"}, headers=admin
        )
        assert opened.status_code == 201, opened.text
        files = {
            0: discrete_rows(4, 30, expert=True, prefix="demo", seed=1),
            1: discrete_rows(6, 50, seed=2),
        }
        for number, columns in files.items():
            uploaded = client.post(
                f"/api/loops/{SLUG}/rounds/{number}/rollouts",
                files={"file": (f"round-{number}.parquet", parquet_bytes(columns))},
                headers=admin,
            )
            assert uploaded.status_code == 201, uploaded.text

        # ranking: queued by the app, run by the worker process
        started_job = client.post(
            f"/api/loops/{SLUG}/rounds/1/ranking", json={"budget": 20, "seed": 7}, headers=admin
        )
        assert started_job.status_code == 202, started_job.text
        job_id = started_job.json()["job"]["id"]
        job = wait_for_job(client, job_id, admin, timeout=60)
        assert job["status"] == "done", job
        assert job["result"]["chosen"] == 20 and job["result"]["candidates"] == 300
        ran_by = pg_cluster.execute(f"SELECT worker FROM jobs WHERE id = {job_id}", "expertloop")
        assert re.search(rf":{worker.pid}:", str(ran_by[0][0])), (ran_by, worker.pid)
        selection = client.get(f"/api/loops/{SLUG}/rounds/1/selection", headers=admin).json()
        assert selection["total"] == 20 and selection["seed"] == 7

        # one label through the queue; a repeat of the same submission stores nothing new
        claimed = client.post(f"/api/loops/{SLUG}/queue/claim", headers=annotator)
        assert claimed.status_code == 200, claimed.text
        item = claimed.json()["item"]
        assert item is not None and item["state"]["id"] in {
            s["step_id"] for s in selection["items"]
        }
        label = {"submission_id": "smoke-test-0001", "answer": "action", "action": 2}
        url = f"/api/loops/{SLUG}/queue/items/{item['item_id']}/labels"
        first = client.post(url, json=label, headers=annotator)
        assert first.status_code == 201, first.text
        assert first.json()["action_name"] == "hold"
        again = client.post(url, json=label, headers=annotator)
        assert again.status_code == 200 and again.json()["repeated"] is True

        # metrics: admin only, counts read from the store
        assert client.get("/metrics").status_code == 401
        assert client.get("/metrics", headers=annotator).status_code == 403
        scraped = client.get("/metrics", headers=admin)
        assert scraped.status_code == 200
        values = _metrics(scraped.text)
        assert values[("expertloop_steps_ingested_total", ())] == 120 + 300
        assert values[("expertloop_labels_submitted_total", ())] == 1
        assert values[("expertloop_jobs", (("kind", "rank"), ("status", "done")))] == 1
        assert values[("expertloop_queue_depth", (("loop", SLUG),))] == 19  # one item done
    finally:
        stop_all(started)
    # SIGTERM (what `docker compose stop` sends) ends both services cleanly
    assert app.process is not None and app.process.returncode == 0, app.output()[-3000:]
    assert worker.process is not None and worker.process.returncode == 0, worker.output()[-3000:]
    for service in (app, worker):
        assert "Traceback" not in service.output(), service.output()[-3000:]
