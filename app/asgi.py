"""The ASGI application for uvicorn (settings from the environment)."""

from .main import create_app

app = create_app()
