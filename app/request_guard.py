"""Refuse, before any route runs, an address whose path or query holds a control character.

PostgreSQL refuses NUL in text and SQLite stores it, so a NUL in a slug or key would get a 422
from one backend and a 404 from the other; refusing every such address here gives one answer.
A pure ASGI middleware, so that answers pass through it unwrapped.
"""

from __future__ import annotations

import json
import re
from urllib.parse import unquote_to_bytes

from starlette.types import ASGIApp, Receive, Scope, Send

_CONTROL = re.compile(rb"[\x00-\x1f\x7f]")


def _has_control(raw: bytes) -> bool:
    return bool(_CONTROL.search(unquote_to_bytes(raw)))


class RefuseControlCharacters:
    """Answer 422 to a request whose decoded path or query string holds a control character."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http":
            raw_path = scope.get("raw_path") or scope["path"].encode("utf-8", "surrogateescape")
            if _has_control(raw_path) or _has_control(scope.get("query_string", b"")):
                body = json.dumps(
                    {"detail": "the address holds a control character; remove it and try again"}
                ).encode()
                await send(
                    {
                        "type": "http.response.start",
                        "status": 422,
                        "headers": [
                            (b"content-type", b"application/json"),
                            (b"content-length", str(len(body)).encode()),
                        ],
                    }
                )
                await send({"type": "http.response.body", "body": body})
                return
        await self.app(scope, receive, send)
