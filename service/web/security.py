"""Response headers that keep a browser from running, framing or guessing at what we send.

The pages load only this service's own scripts, styles and images (plots arrive as ``data:``
SVG), so a Content-Security-Policy can forbid everything else: an injected ``<script>`` in a
label would not run even if escaping ever failed. Style attributes stay allowed, since the
report draws its probability bars with them.
"""

from __future__ import annotations

from starlette.types import ASGIApp, Message, Receive, Scope, Send

CONTENT_SECURITY_POLICY = (
    "default-src 'self'; script-src 'self'; style-src 'self' 'unsafe-inline'; img-src 'self' data:; "
    "object-src 'none'; base-uri 'none'; form-action 'self'; frame-ancestors 'none'"
)

HEADERS = (
    (b"content-security-policy", CONTENT_SECURITY_POLICY.encode()),
    (b"x-content-type-options", b"nosniff"),
    (b"x-frame-options", b"DENY"),
    (b"referrer-policy", b"same-origin"),
)


class SecurityHeadersMiddleware:
    """Add :data:`HEADERS` to every HTTP response that does not set them itself."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                present = {name.lower() for name, _ in message.get("headers", ())}
                message["headers"] = [*message.get("headers", ()),
                                      *((name, value) for name, value in HEADERS if name not in present)]
            await send(message)

        await self.app(scope, receive, send_with_headers)
