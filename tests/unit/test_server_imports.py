"""What a server loads before its first request: no scientific stack it does not need yet.

scipy (ranking only) and pandas (nothing of ours) each cost an idle server tens of MB of
resident memory, which the export benchmark's peak-memory target (README, "Export") counts.
"""

from __future__ import annotations

import subprocess
import sys


def test_the_server_app_loads_neither_scipy_nor_pandas():
    code = (
        "import sys, expertloop.main; "
        "print(sorted(m for m in ('scipy', 'pandas') if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"
