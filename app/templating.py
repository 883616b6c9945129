"""Jinja2 templates (autoescaped) shared by every page."""

from __future__ import annotations

from fastapi.templating import Jinja2Templates

from .resources import shipped_folder
from .safety import SAFETY_CAUTION

TEMPLATES_DIR = shipped_folder("templates")
STATIC_DIR = shipped_folder("static")

templates = Jinja2Templates(directory=str(TEMPLATES_DIR))

templates.env.globals["safety_caution"] = SAFETY_CAUTION
