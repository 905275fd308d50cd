"""Limits on what a request may carry, checked before any route sees it (pure ASGI middleware).

The upload size limit (``RAMIFORM_MAX_UPLOAD_MB``) is enforced while the body streams: a
request whose ``Content-Length`` is over the limit is answered 413 before a byte of its body
is read; one without it (chunked) is counted as it arrives and refused the moment the running
count passes the limit. Either way the answer is the usual ``{"detail": "..."}`` and the rest
of the body is never read into memory. URLs carrying NUL characters are refused with 400.
"""

from __future__ import annotations

from starlette.exceptions import HTTPException
from starlette.responses import JSONResponse
from starlette.types import ASGIApp, Message, Receive, Scope, Send


def _declared_length(scope: Scope) -> int | None:
    for name, value in scope.get("headers", ()):
        if name == b"content-length":
            try:
                return int(value)
            except ValueError:
                return None
    return None


class UploadLimitMiddleware:
    """Refuse request bodies larger than ``max_bytes`` with 413, without reading them whole."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        if max_bytes < 1:
            raise ValueError(f"max_bytes must be positive, got {max_bytes}")
        self.app = app
        self.max_bytes = max_bytes
        self.reason = (f"the upload is larger than this service's limit of {max_bytes / 2**20:g} MiB "
                       "(RAMIFORM_MAX_UPLOAD_MB)")

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = _declared_length(scope)
        if declared is not None and declared > self.max_bytes:
            await JSONResponse({"detail": self.reason}, status_code=413)(scope, receive, send)
            return

        received = 0
        started = False

        async def counting_receive() -> Message:
            nonlocal received
            if received > self.max_bytes:  # an app that swallowed the first refusal gets no more
                raise HTTPException(413, self.reason)
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > self.max_bytes:
                    # Raised inside the app's body parsing; the app's HTTP error handler answers it.
                    raise HTTPException(413, self.reason)
            return message

        async def watching_send(message: Message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, counting_receive, watching_send)
        except HTTPException as exc:  # raised where no handler of the app caught it
            if exc.status_code != 413 or started:
                raise
            await JSONResponse({"detail": self.reason}, status_code=413)(scope, receive, send)


class NulGuardMiddleware:
    """Refuse URLs carrying NUL characters (``%00``) with 400.

    No id, label or file name holds one, and PostgreSQL text cannot store or compare one: such
    a value would otherwise reach the database and fail there, as a server error.
    """

    reason = "URLs must not contain NUL characters (%00)"

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http" and ("\x00" in scope.get("path", "") or b"%00" in scope.get("query_string", b"")):
            await JSONResponse({"detail": self.reason}, status_code=400)(scope, receive, send)
            return
        await self.app(scope, receive, send)


class UploadQueueMiddleware:
    """Answer 503 (with ``Retry-After``) when ``max_in_flight`` uploads are already being handled.

    Each waiting upload holds its body in memory and a place in the analysis queue; past a
    bound, a burst would only grow both until the process fails. Refusing early keeps the
    service answering everyone else, and a client can retry later. Counted per process.
    """

    retry_after_s = 30

    def __init__(self, app: ASGIApp, max_in_flight: int, path: str = "/api/specimens") -> None:
        if max_in_flight < 1:
            raise ValueError(f"max_in_flight must be positive, got {max_in_flight}")
        self.app = app
        self.max_in_flight = max_in_flight
        self.path = path
        self.in_flight = 0

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] != "POST" or scope["path"].rstrip("/") != self.path:
            await self.app(scope, receive, send)
            return
        if self.in_flight >= self.max_in_flight:
            detail = (f"the service is already handling {self.in_flight} uploads; "
                      f"try again in {self.retry_after_s} s")
            response = JSONResponse({"detail": detail}, status_code=503,
                                    headers={"Retry-After": str(self.retry_after_s)})
            await response(scope, receive, send)
            return
        self.in_flight += 1  # one event loop per process: no lock needed between awaits
        try:
            await self.app(scope, receive, send)
        finally:
            self.in_flight -= 1
