"""The submit's repeat check looks an annotator's answer up by state and annotator.

Found by profiling: with an index on the state alone, SQLite searched the annotator index and
read every label the annotator had given, so each submit slowed as the annotator worked. The plan
is read from the store itself. SQLite plans without statistics (the service never gathers
them), so its plan shows on an empty table; PostgreSQL plans by statistics, so it is shown an
annotator with 5,000 labels on as many states and analyses them, all rolled back afterwards.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy.engine import Connection, Engine

from expertloop.queue.labels import _answers_query

PARAMS = {"submission_id": "sub-00000001", "step_id": 17, "item_id": 17, "user_id": 1}


def _plan(conn: Connection) -> str:
    compiled = _answers_query().compile(dialect=conn.dialect)
    values = compiled.construct_params(PARAMS)
    rows: Any
    if conn.dialect.name == "postgresql":
        rows = conn.exec_driver_sql("EXPLAIN " + str(compiled), values).all()
    else:
        ordered = tuple(values[name] for name in compiled.positiontup or ())
        rows = conn.exec_driver_sql("EXPLAIN QUERY PLAN " + str(compiled), ordered).all()
    return "\n".join(str(row[-1]) for row in rows)


def _one_busy_annotator(conn: Connection) -> None:
    # Only the planner's statistics matter here, so the rows need no loop, round or state
    # behind them: the session skips foreign-key triggers (replica role) until the rollback.
    conn.exec_driver_sql("SET LOCAL session_replication_role = replica")
    conn.exec_driver_sql(
        "INSERT INTO labels (step_id, round_id, user_id, submission_id, answer, learner_shown,"
        " span, created_at) SELECT g, 1, 1, 'sub-' || g, 'action', false, false, now()"
        " FROM generate_series(1, 5000) AS g"
    )
    conn.exec_driver_sql("ANALYZE labels")


def test_an_answer_is_found_by_state_and_annotator_not_by_annotator_alone(engine: Engine) -> None:
    with engine.connect() as conn:
        transaction = conn.begin()
        try:
            if conn.dialect.name == "postgresql":
                _one_busy_annotator(conn)
            plan = _plan(conn)
        finally:
            transaction.rollback()
    assert "ix_labels_step_id_user_id" in plan, plan
    assert "ix_labels_user_id_created_at" not in plan, plan
