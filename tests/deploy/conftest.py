"""Fixtures of the deployment tests: a private PostgreSQL cluster and a folder for process logs."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.deploy.pgcluster import pg_cluster  # noqa: F401  (a fixture, used by name)


@pytest.fixture
def log_dir(tmp_path: Path) -> Path:
    """Where the test's server and worker processes write their output."""
    folder = tmp_path / "logs"
    folder.mkdir()
    return folder
