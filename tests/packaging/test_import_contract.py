"""The stages import one way: the import contract in pyproject.toml holds (import-linter).

A new import from an earlier stage into a later one (the sampler reaching into the queue, say)
fails here and in CI's `lint-imports`, naming the import and its line.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

REPOSITORY = Path(__file__).resolve().parents[2]
LINT = "from importlinter.cli import lint_imports_command; lint_imports_command()"


def test_the_import_contract_is_kept() -> None:
    done = subprocess.run(
        [sys.executable, "-c", LINT, "--no-cache"],
        cwd=REPOSITORY,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 0, done.stdout[-4000:] + done.stderr[-2000:]
    assert "1 kept, 0 broken" in done.stdout
