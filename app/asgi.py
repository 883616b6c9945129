"""The ASGI application for uvicorn (settings from the environment)."""

from app.main import create_app

app = create_app()
