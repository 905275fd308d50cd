"""Signing in on the pages: the lab's key is asked once, then a signed cookie stands for it.

With ``RAMIFORM_API_KEYS`` set, REST clients send ``Authorization: Bearer KEY`` on every
request. A browser instead signs in once on ``/login`` and receives a cookie naming its lab,
signed with the service's secret (itsdangerous), HttpOnly (no script reads it) and SameSite
(other sites' pages do not send it). The cookie holds no key, only a keyed fingerprint of it,
so changing or removing a lab's key ends that lab's sessions. Keys are never logged.
"""

from __future__ import annotations

import logging
from typing import Annotated
from urllib.parse import quote

from fastapi import APIRouter, FastAPI, Form, Query, Request
from fastapi.exception_handlers import http_exception_handler
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.types import ASGIApp, Receive, Scope, Send

from service.web.credentials import (COOKIE_MAX_AGE_S, COOKIE_NAME, SAFE_METHODS, cookie_value, current_lab,
                                     lab_for_key, lab_from_cookie, same_origin)
from service.web.settings import Settings
from service.web.templating import templates

__all__ = ["COOKIE_MAX_AGE_S", "COOKIE_NAME", "KeyBeforeBodyMiddleware", "cookie_value", "install_login_redirect",
           "lab_from_cookie", "router"]

log = logging.getLogger("ramiform.web.auth")
router = APIRouter(include_in_schema=False)


def _safe_next(target: str | None) -> str:
    # Only a path on this service: never an absolute or scheme-relative URL (open redirect).
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return "/"
    return target


def _login_page(request: Request, *, next_path: str, error: str | None, status_code: int) -> HTMLResponse:
    return templates.TemplateResponse(request, "login.html", {"next": next_path, "error": error},
                                      status_code=status_code)


@router.get("/login", response_class=HTMLResponse)
async def login_form(request: Request, next: Annotated[str | None, Query(max_length=2000)] = None) -> Response:
    settings: Settings = request.app.state.settings
    if not settings.keys_by_lab:
        return RedirectResponse(_safe_next(next), status_code=303)
    return _login_page(request, next_path=_safe_next(next), error=None, status_code=200)


@router.post("/login", response_class=HTMLResponse)
async def login(
    request: Request,
    key: Annotated[str, Form(max_length=1000)],
    next: Annotated[str | None, Form(max_length=2000)] = None,
) -> Response:
    settings: Settings = request.app.state.settings
    # Another site's form must not sign this browser in (to a lab of the attacker's choosing).
    lab = lab_for_key(settings, key.strip()) if settings.keys_by_lab and same_origin(request) else None
    if lab is None:
        log.info("page sign-in refused: unknown key")
        return _login_page(request, next_path=_safe_next(next), error="That key is not valid here.",
                           status_code=401)
    log.info("lab %s signed in on the pages", lab)
    response = RedirectResponse(_safe_next(next), status_code=303)
    response.set_cookie(COOKIE_NAME, cookie_value(settings, lab), max_age=COOKIE_MAX_AGE_S, httponly=True,
                        samesite="lax", secure=request.url.scheme == "https", path="/")
    return response


@router.post("/logout")
async def logout() -> Response:
    response = RedirectResponse("/login", status_code=303)
    response.delete_cookie(COOKIE_NAME, path="/", httponly=True, samesite="lax")
    return response


def install_login_redirect(app: FastAPI) -> None:
    """A page asked for without a valid key sends the browser to ``/login`` and back."""

    @app.exception_handler(StarletteHTTPException)
    async def _to_login(request: Request, exc: StarletteHTTPException) -> Response:
        path = request.url.path
        wants_page = not path.startswith(("/api/", "/static/")) and "text/html" in request.headers.get("accept", "")
        if exc.status_code == 401 and wants_page and request.method in SAFE_METHODS:
            target = path + (f"?{request.url.query}" if request.url.query else "")
            return RedirectResponse(f"/login?next={quote(target, safe='')}", status_code=303)
        return await http_exception_handler(request, exc)


class KeyBeforeBodyMiddleware:
    """With keys on, check an API request's credentials before its body is read.

    The routes check the key too, but only after the framework has parsed the whole body:
    without this, anyone could make the service read uploads up to the size limit before
    being told 401. Requests without a body, and the pages, pass straight through.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http" and scope["path"].startswith("/api/") and _carries_body(scope):
            try:
                current_lab(Request(scope))
            except StarletteHTTPException as exc:
                response = JSONResponse({"detail": exc.detail}, status_code=exc.status_code, headers=exc.headers)
                await response(scope, receive, send)
                return
        await self.app(scope, receive, send)


def _carries_body(scope: Scope) -> bool:
    headers = dict(scope.get("headers", ()))
    return b"transfer-encoding" in headers or headers.get(b"content-length", b"0") not in (b"0", b"")
