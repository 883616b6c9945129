"""Where the files that ship with the code live: templates, static files, migrations, demo data.

In the source tree they sit beside the source folder (`templates/` next to `app/`); installed
from a wheel they sit inside the package (`expertloop/templates/`), as pyproject.toml maps them.
"""

from __future__ import annotations

from pathlib import Path

PACKAGE_DIR = Path(__file__).resolve().parent


def shipped_folder(name: str) -> Path:
    """The folder `name` (templates, static, migrations, demo_data) of this installation."""
    installed = PACKAGE_DIR / name
    return installed if installed.is_dir() else PACKAGE_DIR.parent / name
