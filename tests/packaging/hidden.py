"""Make an installed library look uninstalled to a subprocess."""

from __future__ import annotations

from pathlib import Path


def hide(tmp_path: Path, import_name: str) -> Path:
    """A folder that, first on the path, makes `import_name` look uninstalled."""
    package = tmp_path / "hidden" / import_name
    package.mkdir(parents=True)
    (package / "__init__.py").write_text(
        f"raise ModuleNotFoundError('hidden by the test', name={import_name!r})\n"
    )
    return package.parent
