"""Revision 0006 turns each loop's gap in seconds into a gap in recorded steps, at each loop's
own control rate, and back on downgrade."""

from __future__ import annotations

import json

from alembic import command
from sqlalchemy import text

from expertloop.migrations_state import alembic_config
from tests.helpers import DISCRETE_SPEC, discrete_rows, parquet_bytes


def _settings(engine, slug):
    with engine.connect() as conn:
        found = conn.execute(
            text("SELECT settings FROM loops WHERE slug = :s"), {"s": slug}
        ).scalar_one()
    return json.loads(found) if isinstance(found, str) else found


def test_gap_in_seconds_becomes_steps_at_each_loops_own_rate(
    client, admin, uploader, engine, database_url
):
    for slug, gap in (("default-gap", None), ("fast-robot", 25), ("no-rollouts", 4)):
        settings = {} if gap is None else {"min_gap_steps": gap}
        spec = {**DISCRETE_SPEC, "slug": slug, "settings": settings}
        assert client.post("/api/loops", json=spec, headers=admin).status_code == 201
    fifty_hz = discrete_rows(2, 6, expert=True, prefix="demo")
    fifty_hz["time_s"] = [0.02 * s for s in fifty_hz["step"]]
    uploaded = client.post(
        "/api/loops/fast-robot/rounds/0/rollouts",
        files={"file": ("f.parquet", parquet_bytes(fifty_hz))},
        headers=uploader,
    )
    assert uploaded.status_code == 201, uploaded.text
    config = alembic_config(database_url)
    try:
        command.downgrade(config, "0009")
        # back to seconds: the default is the old default; 25 steps at 50 Hz are 0.5 s; a loop
        # without rollouts is taken to run at 10 Hz
        assert _settings(engine, "default-gap")["min_gap_s"] == 1.0
        assert _settings(engine, "fast-robot")["min_gap_s"] == 0.5
        assert _settings(engine, "no-rollouts")["min_gap_s"] == 0.4
        assert "min_gap_steps" not in _settings(engine, "fast-robot")
        assert "self_tuning" not in _settings(engine, "fast-robot")
    finally:
        command.upgrade(config, "head")
    assert _settings(engine, "default-gap")["min_gap_steps"] == 10
    assert _settings(engine, "fast-robot")["min_gap_steps"] == 25
    assert _settings(engine, "no-rollouts")["min_gap_steps"] == 4
    assert "min_gap_s" not in _settings(engine, "fast-robot")
    assert client.get("/api/loops/fast-robot", headers=admin).status_code == 200
