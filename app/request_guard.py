"""Refusals before any route runs: an address holding a control character, a body declared
larger than the upload limit.

PostgreSQL refuses NUL in text and SQLite stores it, so a NUL in a slug or key would get a 422
from one backend and a 404 from the other; refusing every such address here gives one answer.
Pure ASGI middlewares, so that answers pass through them unwrapped and no request pays for a
wrapped response.
"""

from __future__ import annotations

import json
import re
from urllib.parse import unquote_to_bytes

from starlette.responses import JSONResponse
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


# Room for the multipart framing and form fields around a file of the largest size allowed.
FORM_OVERHEAD_BYTES = 65536


class RefuseOversized:
    """Answer 413 to a request whose Content-Length exceeds the upload limit, before its body is
    read; chunked bodies are still capped while they are spooled."""

    def __init__(self, app: ASGIApp, *, max_upload_bytes: int) -> None:
        self.app = app
        self.max_upload_bytes = max_upload_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http":
            declared = _header(scope, b"content-length")
            if declared and declared.isdigit():
                if int(declared) > self.max_upload_bytes + FORM_OVERHEAD_BYTES:
                    detail = (
                        f"the request is larger than the upload limit of "
                        f"{self.max_upload_bytes} bytes"
                    )
                    await JSONResponse({"detail": detail}, status_code=413)(scope, receive, send)
                    return
        await self.app(scope, receive, send)


def _header(scope: Scope, name: bytes) -> bytes | None:
    # ASGI servers give header names in lower case
    for key, value in scope["headers"]:
        if key == name:
            return bytes(value)
    return None
