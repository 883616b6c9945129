"""Security headers on every answer, as a pure ASGI middleware (it only adds headers to the
response start message, so streamed answers stay streamed).

- Content-Security-Policy: scripts, styles, images and connections from our own origin only;
  no inline script or style (pages keep theirs in static files); no framing by any site.
- X-Content-Type-Options: nosniff, so a browser never runs a stored file as another type.
- Referrer-Policy: same-origin, so addresses with slugs and keys do not leak to other sites.
- Cache-Control: no-store on everything but the static files, since every other answer is for
  one signed-in caller (public health checks included: they are cheap and must be fresh).
"""

from __future__ import annotations

from starlette.types import ASGIApp, Message, Receive, Scope, Send

CONTENT_SECURITY_POLICY = (
    "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "connect-src 'self'; font-src 'self'; object-src 'none'; base-uri 'none'; "
    "form-action 'self'; frame-ancestors 'none'"
)
ALWAYS = (
    (b"content-security-policy", CONTENT_SECURITY_POLICY.encode()),
    (b"x-content-type-options", b"nosniff"),
    (b"x-frame-options", b"DENY"),
    (b"referrer-policy", b"same-origin"),
)
NO_STORE = (b"cache-control", b"no-store")
STATIC_PREFIX = "/static/"


class SecurityHeaders:
    """Add the headers above to every HTTP answer that does not set them itself."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        extra = ALWAYS if scope["path"].startswith(STATIC_PREFIX) else (*ALWAYS, NO_STORE)

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = list(message.get("headers", []))
                present = {name.lower() for name, _ in headers}
                headers += [(name, value) for name, value in extra if name not in present]
                message = {**message, "headers": headers}
            await send(message)

        await self.app(scope, receive, send_with_headers)
