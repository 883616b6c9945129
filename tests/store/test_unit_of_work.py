"""A route that writes is one unit of work, committed before its answer is sent.

If the commit fails, the client must learn it from the answer: a 201 for a loop that was never
stored would send a training team on with a loop that does not exist. The writer session
commits in the dependency's exit, which FastAPI runs before sending the answer only for
dependencies with scope="function" (otherwise after it).
"""

from __future__ import annotations

from fastapi.testclient import TestClient
from sqlalchemy.orm import Session

from tests.helpers import DISCRETE_SPEC


def test_a_failed_commit_is_the_answer_and_nothing_is_stored(app, client, admin, monkeypatch):
    real_commit = Session.commit

    def failing_commit(self: Session) -> None:
        raise RuntimeError("the store refused the commit (simulated)")

    monkeypatch.setattr(Session, "commit", failing_commit)
    with TestClient(app, raise_server_exceptions=False) as answering:
        created = answering.post("/api/loops", json=DISCRETE_SPEC, headers=admin)
    monkeypatch.setattr(Session, "commit", real_commit)
    assert created.status_code == 500, created.text
    assert "failed" in created.json()["detail"]
    assert client.get("/api/loops/aisle-crossing", headers=admin).status_code == 404
