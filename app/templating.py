"""Jinja2 templates (autoescaped) shared by every page."""

from __future__ import annotations

from pathlib import Path

from fastapi.templating import Jinja2Templates

TEMPLATES_DIR = Path(__file__).resolve().parent.parent / "templates"
STATIC_DIR = Path(__file__).resolve().parent.parent / "static"

templates = Jinja2Templates(directory=str(TEMPLATES_DIR))

SAFETY_CAUTION = (
    "Data from this service trains policies that move machines near people. Labels and reports "
    "here are evidence for engineers, not a safety case: deployment decisions follow the "
    "applicable safety standards and local regulations, and the judgement of qualified safety "
    "engineers."
)
templates.env.globals["safety_caution"] = SAFETY_CAUTION
