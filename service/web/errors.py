"""The one place where errors become HTTP answers, always ``{"detail": "..."}``."""

from __future__ import annotations

import logging

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse

from service.errors import RamiformError

log = logging.getLogger("ramiform.web")


def _location(loc: tuple) -> str:
    parts = [str(p) for p in loc if p not in ("body", "query", "path", "header", "cookie")]
    return ".".join(parts) or "request"


def install_error_handlers(app: FastAPI) -> None:
    """Map our domain errors by their ``status_code``, and make every error body a sentence."""

    @app.exception_handler(RamiformError)
    async def _domain_error(request: Request, exc: RamiformError) -> JSONResponse:
        if exc.status_code >= 500:
            log.error("%s on %s %s: %s", type(exc).__name__, request.method, request.url.path, exc)
        return JSONResponse({"detail": str(exc)}, status_code=exc.status_code)

    @app.exception_handler(RequestValidationError)
    async def _invalid_request(request: Request, exc: RequestValidationError) -> JSONResponse:
        # Pydantic prefixes a validator's own sentence with "Value error, "; the sentence is the reason.
        detail = "; ".join(f"{_location(tuple(e.get('loc', ())))}: {str(e.get('msg', 'invalid')).removeprefix('Value error, ')}"
                           for e in exc.errors())
        return JSONResponse({"detail": detail or "invalid request"}, status_code=422)

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception) -> JSONResponse:
        log.exception("unexpected error on %s %s", request.method, request.url.path)
        return JSONResponse({"detail": "internal error; the service has logged it"}, status_code=500)
