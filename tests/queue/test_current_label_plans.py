"""The queue's statements that ask whether a label still counts keep probing indexes as the
`labels` table grows.

Found with PostgreSQL's auto_explain under the queue benchmark: on a new store, the submit's
repeat check read the whole `labels` table at nearly every execution, because "superseded by a
later label" was one anti-join on `supersedes_id = id OR supersedes_id = span_anchor_id`. While
the table was small and had no statistics, the planner costed a scan below that OR's two index
probes; the plan it then cached for the prepared statement (a generic plan, made once for every
later execution) kept scanning as the table grew, until statistics would be gathered.

Here, as on a server's pooled connection: each statement runs a dozen times (psycopg prepares it
on the fifth, PostgreSQL settles on a plan after five more) while `labels` holds 50 to 1,000
rows, the table grows to 3,000 without new statistics, and twenty more executions must not scan
it (the transaction's own counters, `pg_stat_xact_user_tables`). All rolled back afterwards.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import pytest
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.sql import Executable

from expertloop.queue.labels import _answers_query
from expertloop.queue.rules import _lease_if_room, candidate_query
from tests.conftest import PG_URL

pytestmark = pytest.mark.skipif(not PG_URL, reason="prepared statements' plans are PostgreSQL's")

NOW = datetime(2026, 1, 1, tzinfo=UTC)
PARAMS: dict[str, Any] = {
    "submission_id": "sub-00000001",
    "step_id": 32,  # a state that annotator 1 labelled (below)
    "item_id": 32,
    "user_id": 1,
    "round_id": 1,
    "now": NOW,
    "expires_at": NOW,
}
STATEMENTS: dict[str, Executable] = {
    "submit's repeat check": _answers_query(),
    "claim's candidate": candidate_query(True),
    "lease if room": _lease_if_room(),
}


def _queue(conn: Connection, items: int) -> None:
    """Round 1's queue: `items` states, each wanting two labels."""
    conn.exec_driver_sql(
        "INSERT INTO queue_items (id, round_id, step_id, position, labels_needed, labels_done,"
        " show_learner, status, created_at) SELECT g, 1, g, g, 2, 0, false, 'open', now()"
        " FROM generate_series(1, %(items)s) AS g",
        {"items": items},
    )


def _labels_up_to(conn: Connection, have: int, total: int) -> None:
    """Labels `have + 1` to `total`, one on each queued state, by 32 annotators in turn."""
    conn.exec_driver_sql(
        "INSERT INTO labels (step_id, item_id, round_id, user_id, submission_id, answer,"
        " learner_shown, span, created_at) SELECT g, g, 1, 1 + g %% 32, 'sub-' || g, 'action',"
        f" false, false, now() FROM generate_series({have + 1}, {total}) AS g"
    )


def _label_scans(conn: Connection) -> int:
    return int(
        conn.exec_driver_sql(
            "SELECT seq_scan FROM pg_stat_xact_user_tables WHERE relname = 'labels'"
        ).scalar_one()
    )


@pytest.mark.parametrize("settled_at", [50, 300, 1000])
@pytest.mark.parametrize("name", list(STATEMENTS))
def test_a_prepared_statement_does_not_scan_labels_as_the_table_grows(
    engine: Engine, name: str, settled_at: int
) -> None:
    statement = STATEMENTS[name]
    with engine.connect() as conn:
        transaction = conn.begin()
        try:
            # Only the table's size matters, so the rows need no loop, round or state behind
            # them: the session skips foreign-key triggers (replica role) until the rollback.
            conn.exec_driver_sql("SET LOCAL session_replication_role = replica")
            _queue(conn, 3000)
            _labels_up_to(conn, 0, settled_at)
            for _ in range(12):
                conn.execute(statement, PARAMS).all()
            _labels_up_to(conn, settled_at, 3000)
            before = _label_scans(conn)
            for _ in range(20):
                conn.execute(statement, PARAMS).all()
            scans = _label_scans(conn) - before
        finally:
            transaction.rollback()
    assert scans == 0, f"{scans} full scans of labels in 20 executions"
