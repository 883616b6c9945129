"""Jinja2 templates (autoescaped) shared by every page."""

from __future__ import annotations

from pathlib import Path

from fastapi.templating import Jinja2Templates

from app.safety import SAFETY_CAUTION

TEMPLATES_DIR = Path(__file__).resolve().parent.parent / "templates"
STATIC_DIR = Path(__file__).resolve().parent.parent / "static"

templates = Jinja2Templates(directory=str(TEMPLATES_DIR))

templates.env.globals["safety_caution"] = SAFETY_CAUTION
