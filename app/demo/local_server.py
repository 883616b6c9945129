"""Start expertloop on a free loopback port in this process (for demo runs and tests)."""

from __future__ import annotations

import socket
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass

import uvicorn

from ..auth import service as auth_service
from ..config import Settings
from ..main import create_app
from ..migrations_state import upgrade


def free_port() -> int:
    """A port free on 127.0.0.1 right now (the server binds it a moment later)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@dataclass
class LocalServer:
    url: str
    admin_token: str
    annotator_token: str


@contextmanager
def local_server(settings: Settings) -> Iterator[LocalServer]:
    """Migrate the store, add a demo admin and a scripted-expert annotator, serve until exit."""
    upgrade(settings.resolved_database_url)
    app = create_app(settings)
    with app.state.session_factory.begin() as session:
        admin = auth_service.create_user(
            session, name=f"run-admin-{time.time_ns()}", roles=["admin"]
        )
        expert = auth_service.create_user(
            session, name=f"scripted-expert-{time.time_ns()}", roles=["annotator"]
        )
        tokens = (
            auth_service.issue_token(session, user=admin),
            auth_service.issue_token(session, user=expert),
        )
    port = free_port()
    server = uvicorn.Server(uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning"))
    thread = threading.Thread(target=server.run, name="expertloop-local-server", daemon=True)
    thread.start()
    deadline = time.monotonic() + 30
    while not server.started:
        if time.monotonic() > deadline or not thread.is_alive():
            raise RuntimeError("the local expertloop server did not start")
        time.sleep(0.05)
    try:
        yield LocalServer(f"http://127.0.0.1:{port}", *tokens)
    finally:
        server.should_exit = True
        thread.join(timeout=30)
